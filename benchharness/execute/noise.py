"""Noise controls that the harness checks or applies outside the child.

* `parse_cpu_list` / `check_cpus`: CPU sets in the kernel's list syntax
  (``"0-2,5"``), checked against the CPUs this machine has and this process may
  use, so that a pinned experiment fails before its first run rather than
  during it.
* `drop_page_cache`: the cold-cache mode; flushes dirty pages (``sync``) and asks
  the kernel to drop the page cache, dentries and inodes
  (``/proc/sys/vm/drop_caches``, documented in the kernel's
  ``Documentation/admin-guide/sysctl/vm.rst``). Only root outside a container
  may; otherwise it says why not.

Pinning, niceness and ASLR control are applied in the child by the launcher.
Rationale for all of them: Mytkowicz et al. (2009), "Producing wrong data
without doing anything obviously wrong!".
"""

from __future__ import annotations

import os

from benchharness.errors import ExecutionError

DROP_CACHES = "/proc/sys/vm/drop_caches"


def format_cpu_list(cpus) -> str:
    """``[0, 1, 2, 5]`` -> ``"0-2,5"`` (the kernel's list syntax)."""
    cpus = sorted(set(cpus))
    parts = []
    i = 0
    while i < len(cpus):
        j = i
        while j + 1 < len(cpus) and cpus[j + 1] == cpus[j] + 1:
            j += 1
        parts.append(str(cpus[i]) if i == j else f"{cpus[i]}-{cpus[j]}")
        i = j + 1
    return ",".join(parts)


#: Highest CPU number a Linux kernel can have (``NR_CPUS`` is at most 8192).
MAX_CPU = 8191


def parse_cpu_list(text: str) -> tuple[int, ...]:
    """``"0-2,5"`` -> ``(0, 1, 2, 5)``; raises ValueError with a plain reason."""
    text = str(text).strip()
    if not text:
        raise ValueError("an empty CPU list; write CPU numbers like 0 or 0-3,6")
    out: set[int] = set()
    for part in text.split(","):
        part = part.strip()
        lo, sep, hi = part.partition("-")
        try:
            a = int(lo)
            b = int(hi) if sep else a
        except ValueError:
            raise ValueError(f"{part!r} is not a CPU number or range; write e.g. 0, 2-3") from None
        if a < 0 or b < a:
            raise ValueError(f"{part!r} is not a valid CPU range; write LOW-HIGH with LOW <= HIGH")
        if b > MAX_CPU:
            # the kernel numbers at most this many CPUs; checked before the range is made
            raise ValueError(f"{part!r} names CPU {b}, beyond any machine's numbering (at most "
                             f"{MAX_CPU})")
        out.update(range(a, b + 1))
    return tuple(sorted(out))


def _online_cpus() -> set[int] | None:
    try:
        with open("/sys/devices/system/cpu/online") as f:
            return set(parse_cpu_list(f.read()))
    except (OSError, ValueError):
        n = os.cpu_count()
        return set(range(n)) if n else None


def check_cpus(cpus) -> tuple[int, ...]:
    """Validate a CPU set (iterable of ints or list text); returns it sorted.

    Raises `ExecutionError` naming CPUs that do not exist on this machine, or
    that exist but are outside this process's allowed set (a container's cpuset
    or an outer ``taskset``).
    """
    if isinstance(cpus, str):
        try:
            cpus = parse_cpu_list(cpus)
        except ValueError as e:
            raise ExecutionError(str(e)) from None
    try:
        wanted = tuple(sorted({int(c) for c in cpus}))
    except (TypeError, ValueError):
        raise ExecutionError(f"CPU set {cpus!r} is not a list of CPU numbers") from None
    if not wanted:
        raise ExecutionError("the CPU set is empty; name at least one CPU")
    online = _online_cpus()
    allowed = set(os.sched_getaffinity(0))
    if online is not None:
        missing = [c for c in wanted if c not in online]
        if missing:
            raise ExecutionError(
                f"CPU {format_cpu_list(missing)} does not exist on this machine "
                f"(CPUs online: {format_cpu_list(online)})")
    barred = [c for c in wanted if c not in allowed]
    if barred:
        raise ExecutionError(
            f"CPU {format_cpu_list(barred)} exists but this process may not use it "
            f"(allowed: {format_cpu_list(allowed)})")
    return wanted


def drop_page_cache(path: str = DROP_CACHES) -> tuple[bool, str]:
    """Drop the page cache before a cold-cache run; returns ``(ok, reason)``.

    ``reason`` is empty on success, otherwise one line saying why it could not
    be done and what would allow it.
    """
    os.sync()
    try:
        with open(path, "w") as f:
            f.write("3\n")
    except PermissionError as e:
        who = "root" if os.geteuid() == 0 else f"uid {os.geteuid()}"
        hint = ("the kernel refused even root, as it does inside most containers; run on "
                "the host" if os.geteuid() == 0 else "run as root")
        return False, f"cannot drop the page cache: writing {path} as {who} was refused " \
                      f"({e.strerror}); {hint}"
    except OSError as e:
        return False, f"cannot drop the page cache: {path}: {e.strerror or e}"
    return True, ""


__all__ = ["check_cpus", "parse_cpu_list", "format_cpu_list", "drop_page_cache"]
