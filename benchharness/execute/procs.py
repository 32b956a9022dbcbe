"""Which processes are ours: identities recorded beside process ids, checked before any signal.

A process id alone names whatever process holds it now: ids are reused (with
``pid_max`` 32768 they wrap within minutes on a busy machine), so a record that
outlives its process could make the harness signal an unrelated one. Every id
benchharness keeps for later use is therefore recorded with the process's
start time — field 22 of ``/proc/PID/stat``, in clock ticks since boot
(proc(5)) — and the boot id (``/proc/sys/kernel/random/boot_id``). Two
processes alive at different moments of one boot never share both the id and
the start time; a check compares them and signals nothing when they differ.

Where the start time cannot be read at the moment of recording without
delaying the run (the launcher, between spawn and wait), the launcher records
the boot clock just before and just after the spawn: the child's start time
lies between the two, and no other process can have held the id in that
interval, since the child held it.

The signal itself goes through a pidfd (``pidfd_open``, Linux 5.3) opened
before the check, so the process checked is the process signalled. A process
group is signalled only while its first process — checked as above — is
alive: the group's id cannot pass to anyone else while that process holds it.
"""

from __future__ import annotations

import os
import select
import signal
from pathlib import Path

_BOOT_ID: str | None = None


def boot_id() -> str:
    """This boot's id ("" where the kernel does not say)."""
    global _BOOT_ID
    if _BOOT_ID is None:
        try:
            _BOOT_ID = Path("/proc/sys/kernel/random/boot_id").read_text().strip()
        except OSError:
            _BOOT_ID = ""
    return _BOOT_ID


def stat_fields(pid: int) -> list[bytes] | None:
    """Fields of ``/proc/PID/stat`` from field 3 (state) on, or None if there is no such process.

    The command name (field 2) is in parentheses and may itself hold ``)`` and
    spaces, so the fields are taken after the last ``)``.
    """
    try:
        with open(f"/proc/{int(pid)}/stat", "rb") as fh:
            data = fh.read()
    except (OSError, ValueError):
        return None
    return data[data.rfind(b")") + 2:].split()


def start_ticks(pid: int) -> int | None:
    """Start time of ``pid`` in clock ticks after boot (stat field 22), or None."""
    f = stat_fields(pid)
    try:
        return int(f[19]) if f else None
    except (IndexError, ValueError):
        return None


def identity(pid: int) -> dict | None:
    """``{"pid", "start", "boot"}`` of a live process, to record beside its id."""
    start = start_ticks(pid)
    if start is None:
        return None
    return {"pid": int(pid), "start": start, "boot": boot_id()}


def _state(f: list[bytes]) -> bytes:
    return f[0][:1]


def matches(pid, start_lo, start_hi=None, boot: str | None = None) -> bool:
    """Whether ``pid`` is alive (not a zombie) and started within [start_lo, start_hi]
    ticks of the boot ``boot`` (None: this boot)."""
    try:
        pid = int(pid)
        lo = int(start_lo)
        hi = lo if start_hi is None else int(start_hi)
    except (TypeError, ValueError):
        return False
    if pid <= 1 or (boot is not None and boot != boot_id()):
        return False
    f = stat_fields(pid)
    if not f or _state(f) in (b"Z", b"X"):
        return False
    try:
        return lo <= int(f[19]) <= hi
    except (IndexError, ValueError):
        return False


def owner_alive(info) -> bool:
    """Whether a recorded ``{"pid", "start", "boot"}`` still names a live process."""
    if not isinstance(info, dict):
        return False
    return matches(info.get("pid"), info.get("start"), boot=info.get("boot"))


def _open_checked(pid: int, lo, hi) -> int | None:
    """A pidfd of ``pid`` if it is the process recorded, else None."""
    try:
        fd = os.pidfd_open(int(pid))
    except (OSError, ValueError, TypeError, AttributeError):
        return None
    # Checked after the pidfd is open: if the id passed to another process in
    # between, the check fails, and the pidfd never signals the newcomer.
    if matches(pid, lo, hi):
        return fd
    os.close(fd)
    return None


def kill_checked(pid: int, lo, hi=None, wait_s: float = 0.0) -> bool:
    """SIGKILL ``pid`` if it is the process recorded (see `matches`); True if signalled.

    ``wait_s``: then wait up to that long for it to be gone.
    """
    fd = _open_checked(pid, lo, hi)
    if fd is None:
        return False
    try:
        try:
            signal.pidfd_send_signal(fd, signal.SIGKILL)
        except OSError:
            return False
        if wait_s > 0:
            p = select.poll()
            p.register(fd, select.POLLIN)
            p.poll(int(wait_s * 1000))
        return True
    finally:
        os.close(fd)


def group_members(pgid: int) -> list[int]:
    """Live processes whose process group is ``pgid`` (read from /proc)."""
    out = []
    key = str(int(pgid)).encode()
    try:
        names = os.listdir("/proc")
    except OSError:
        return out
    for name in names:
        if not name.isdigit():
            continue
        f = stat_fields(int(name))
        if f and len(f) > 2 and f[2] == key and _state(f) not in (b"Z", b"X"):
            out.append(int(name))
    return out


def kill_group_checked(pgid: int, lo, hi=None) -> str:
    """SIGKILL the process group whose first process is ``pgid`` and started within
    [lo, hi] ticks. Returns ``"killed"``, ``"gone"`` (nothing left of it),
    ``"other"`` (the id now names another process: nothing signalled) or
    ``"leaderless"`` (its first process is gone but others of the group remain:
    they cannot be told from an unrelated group that took the id, so nothing is
    signalled)."""
    fd = _open_checked(pgid, lo, hi)
    if fd is None:
        if start_ticks(pgid) is not None and not _is_zombie(pgid):
            return "other"
        return "leaderless" if group_members(pgid) else "gone"
    try:
        # The first process is ours and alive (the pidfd says it has not exited),
        # so the group id is still ours: signal the group, then that process.
        p = select.poll()
        p.register(fd, select.POLLIN)
        if p.poll(0):
            return "leaderless" if group_members(pgid) else "gone"
        try:
            os.killpg(int(pgid), signal.SIGKILL)
        except ProcessLookupError:
            return "gone"
        except PermissionError:
            return "other"
        try:
            signal.pidfd_send_signal(fd, signal.SIGKILL)
        except OSError:
            pass
        return "killed"
    finally:
        os.close(fd)


def parent_of(pid) -> int | None:
    """The parent process id of ``pid`` (stat field 4), or None."""
    try:
        f = stat_fields(int(pid))
        return int(f[1]) if f else None
    except (IndexError, ValueError, TypeError):
        return None


def _is_zombie(pid: int) -> bool:
    f = stat_fields(pid)
    return bool(f) and _state(f) in (b"Z", b"X")


def cmdline(pid: int) -> bytes:
    try:
        with open(f"/proc/{int(pid)}/cmdline", "rb") as fh:
            return fh.read()
    except (OSError, ValueError):
        return b""


__all__ = ["boot_id", "start_ticks", "identity", "matches", "owner_alive", "kill_checked",
           "kill_group_checked", "group_members", "cmdline", "stat_fields", "parent_of"]
