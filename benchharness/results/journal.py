"""The results folder: frozen inputs, the append-only journal, resume, tidy export.

Layout (the contract in DESIGN.md; outside checks read it)::

    results/<experiment>-<UTC timestamp>/
        experiment.yaml   the experiment file as run (frozen copy)
        plan.csv          every planned run in execution order
        runs.jsonl        the journal: one JSON object per finished run
        runs.csv          tidy export of the journal, one row per run
        host.json         machine facts at start (and load at end)
        session.json      how the harness ran it: seed, workdir, version, state
        inflight          the run being executed now (pid, process group) for resume

Crash safety. Each finished run is appended to ``runs.jsonl`` with a single
unbuffered ``write`` before the next run starts, so a crash of the harness
loses at most the run in flight. A background thread fsyncs the journal at
least once a second while it has unsynced data (group commit: an fsync per run
would cost about a third of a ``/bin/true`` run), and the journal is fsynced at
the end; the folder itself is fsynced when created, so a power cut loses at
most the last second. A torn last line (a crash mid-write) is set aside in
``runs.jsonl.torn`` on resume, never silently dropped. While a harness writes a
folder it holds an exclusive ``fcntl.flock`` on the folder itself (deleting
files cannot undo it) and names itself, with its start time, in ``.lock``; a
second ``run`` or ``--resume`` on it is refused, and so is one while the owner
named there, or the harness named in ``inflight``, is alive.

Nothing already measured is overwritten: a new run never writes into an
existing non-empty folder, and resume only appends.
"""

from __future__ import annotations

from benchharness.numbers import plural

import csv
import datetime as _dt
import errno
import fcntl
import io
import itertools
import json
import os
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Mapping, Sequence

from benchharness.errors import ResultsFolderError, is_disk_full
from benchharness.execute.base import USAGE_FIELDS
from benchharness.measure.floor import COLUMN as FLOOR_COLUMN, at_floor
from benchharness.measure.floor import floor_kib as session_floor_kib

#: Fixed leading columns of runs.csv, before the factor columns.
LEAD_COLUMNS = ("run", "position", "block", "replicate")
#: Fixed columns after the factors (contract order).
CORE_COLUMNS = ("status", "exit_code", *USAGE_FIELDS, "started_at", "message")
#: Columns later capabilities add, in the order they appear when present.
LATER_COLUMNS = ("host", "worker", "host_position", "load_1m", "cpu_mhz", "pad_env_bytes",
                 "aslr", "steady_s", "steady_state", "gate_role")

FILES = ("experiment.yaml", "plan.csv", "runs.jsonl", "runs.csv", "host.json", "session.json")


def utc_stamp(now: _dt.datetime | None = None) -> str:
    now = now or _dt.datetime.now(_dt.timezone.utc)
    return now.strftime("%Y%m%dT%H%M%SZ")


def utc_iso(ts: float | None = None) -> str:
    """ISO 8601 UTC with microseconds (``2026-12-01T22:05:12.123456+00:00``)."""
    t = _dt.datetime.fromtimestamp(time.time() if ts is None else ts, _dt.timezone.utc)
    return t.isoformat(timespec="microseconds")


def fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_atomic(path: Path, data: bytes | str) -> None:
    """Write a whole file via a temporary sibling and rename (never a half file).

    The file is fsynced before the rename and its folder after it, so a power cut
    leaves either the old file or the whole new one under the name.
    """
    tmp = path.with_name(path.name + ".tmp")
    try:
        with open(tmp, "wb") as fh:
            fh.write(data.encode("utf-8") if isinstance(data, str) else data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
        fsync_dir(path.parent)
    except BaseException:
        try:  # a full disk: no half file stays behind (the old one is untouched)
            tmp.unlink()
        except OSError:
            pass
        raise


def check_out(folder: Path) -> None:
    """Refuse an ``--out`` that cannot become a new results folder: a dangling link, a
    file, or a folder that already holds something (results are never written into one)."""
    if folder.is_symlink() and not folder.exists():
        raise ResultsFolderError(f"{folder}: a symbolic link to {os.readlink(folder)}, which "
                                 "does not exist; give --out a new folder path (or remove "
                                 "the link)")
    if folder.exists():
        if not folder.is_dir():
            raise ResultsFolderError(f"{folder}: exists and is not a folder; choose another "
                                     "--out")
        if any(folder.iterdir()):
            raise ResultsFolderError(
                f"{folder}: folder is not empty; results are never written into an existing "
                f"folder (choose a new --out, or continue it with "
                f"`benchharness run --resume {folder}`)")


def new_folder(base: Path, name: str, out: str | os.PathLike | None) -> Path:
    """Create the results folder (never reusing a non-empty one) and fsync it."""
    if out is not None:
        folder = Path(out)
        check_out(folder)
        try:
            folder.mkdir(parents=True, exist_ok=True)
            _probe_writable(folder)
        except OSError as exc:
            raise ResultsFolderError(f"{folder}: cannot create the results folder here "
                                     f"({exc.strerror or exc}); give --out a path in a "
                                     "writable folder") from None
    else:
        try:
            base.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise ResultsFolderError(f"{base}: cannot create the results folder here "
                                     f"({exc.strerror or exc}); run from a writable folder "
                                     "or give --out") from None
        stamp = utc_stamp()
        folder = base / f"{name}-{stamp}"
        n = 1
        while True:
            try:
                folder.mkdir()
                break
            except FileExistsError:
                n += 1
                folder = base / f"{name}-{stamp}-{n}"
    fsync_dir(folder)
    fsync_dir(folder.parent)
    return folder


def _busy(folder: Path, who: str = "another benchharness") -> ResultsFolderError:
    return ResultsFolderError(
        f"{folder}: {who} is writing this results folder right now; wait for it to finish "
        "(or stop it) before running or resuming here")


#: Marks a results folder being set up (a hidden sibling of its final name).
STARTING = ".starting-"
#: What a folder being set up may hold (and a stale one may be removed with).
_STARTING_FILES = {"experiment.yaml", "plan.csv", "design.json", "session.json", "host.json",
                   "runs.jsonl", "inflight", ".lock"}


def start_folder(base: Path, name: str, out: str | os.PathLike | None) -> Path:
    """A new, hidden folder to set a run up in, beside where its results will be.

    The folder gets its final name only once it can be resumed (`publish_folder`):
    a harness killed while setting up leaves no half folder under that name, only
    this hidden one, which a later start in the same place removes (nothing was
    measured in it). ``--out`` is checked here, before anything is made.
    """
    if out is not None:
        final = Path(out)
        check_out(final)
        parent, stub = final.absolute().parent, final.name
    else:
        parent, stub = Path(base), name
    where = "give --out a path in a writable folder" if out is not None else \
        "run from a writable folder or give --out"
    try:
        parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        if is_disk_full(exc):
            raise  # said as such by the runner (a full disk is no bad input)
        raise ResultsFolderError(f"{out if out is not None else parent}: cannot create the "
                                 f"results folder here ({exc.strerror or exc}); {where}") from None
    remove_stale_starts(parent)
    while True:
        folder = parent / f".{stub}{STARTING}{os.getpid()}-{os.urandom(3).hex()}"
        try:
            folder.mkdir()
            _probe_writable(folder)
            return folder
        except FileExistsError:
            continue
        except OSError as exc:
            if is_disk_full(exc):
                discard_start(folder)
                raise
            raise ResultsFolderError(f"{out if out is not None else parent}: cannot create the "
                                     f"results folder here ({exc.strerror or exc}); "
                                     f"{where}") from None


def publish_folder(folder: Path, base: Path, name: str, out: str | os.PathLike | None) -> Path:
    """Give a folder set up by `start_folder` its final name (one ``rename``) and fsync it.

    Without ``--out`` the name is ``<experiment>-<UTC timestamp>`` (``-2``, ``-3``...
    when taken), claimed by ``mkdir`` first so that no other harness's folder is
    ever replaced; the rename then replaces only that empty claim.
    """
    if out is not None:
        final = Path(out)
        try:
            os.rename(folder, final)
        except OSError as e:
            if isinstance(e, (IsADirectoryError, NotADirectoryError)) or \
                    e.errno in (errno.ENOTEMPTY, errno.EEXIST):
                raise ResultsFolderError(f"{final}: something was written there while this run "
                                         "was being set up; choose another --out") from None
            raise
    else:
        stamp = utc_stamp()
        final = Path(base) / f"{name}-{stamp}"
        n = 1
        while True:
            try:
                final.mkdir()
                break
            except FileExistsError:
                n += 1
                final = Path(base) / f"{name}-{stamp}-{n}"
        os.rename(folder, final)
    fsync_dir(final)
    fsync_dir(final.absolute().parent)
    return final


def remove_stale_starts(parent: Path) -> None:
    """Remove folders that `start_folder` made in ``parent`` for harnesses that died
    while setting up (no harness holds their lock, and they hold no measured run)."""
    import shutil

    try:
        entries = [p for p in parent.iterdir() if p.name.startswith(".")
                   and STARTING in p.name]
    except OSError:
        return
    for p in entries:
        owner = p.name.rsplit(STARTING, 1)[1].split("-", 1)[0]
        if owner.isdigit() and (int(owner) == os.getpid() or os.path.exists(f"/proc/{owner}")):
            continue  # its harness (or a process that took its id) lives: leave it
        try:
            if p.is_symlink() or not p.is_dir():
                continue
            names = {q.name for q in p.iterdir()}
            if any(n not in _STARTING_FILES and not n.endswith(".tmp") for n in names):
                continue  # something we did not make: not ours to remove
            if (p / "runs.jsonl").exists() and (p / "runs.jsonl").stat().st_size:
                continue
            fd = os.open(p, os.O_RDONLY | os.O_DIRECTORY | os.O_CLOEXEC)
        except OSError:
            continue
        try:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError:
                continue  # a live harness is setting it up
            shutil.rmtree(p, ignore_errors=True)
        finally:
            os.close(fd)


def discard_start(folder: Path) -> None:
    """Remove a folder `start_folder` made (setting up failed; nothing was measured)."""
    import shutil

    if STARTING in folder.name:
        shutil.rmtree(folder, ignore_errors=True)


class FolderLock:
    """Exclusive lock on a results folder while a harness writes it.

    The lock is an ``flock`` on the folder's own directory, so deleting or
    replacing ``.lock`` cannot release it (where a file system refuses locks on
    directories, ``.lock`` itself is locked). ``.lock`` names the owner (pid,
    start time, boot; `benchharness.execute.procs`) while it holds the lock and
    is emptied on release: a lock is never taken while the owner named there is
    alive, whatever became of the lock itself.
    """

    def __init__(self, folder: Path):
        from benchharness.execute import procs

        self.path = folder / ".lock"
        self.fd = self.dir_fd = None
        try:
            self.dir_fd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY | os.O_CLOEXEC)
            fcntl.flock(self.dir_fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(self.dir_fd)
            raise _busy(folder) from None
        except OSError:
            if self.dir_fd is not None:
                os.close(self.dir_fd)
            self.dir_fd = None
        try:
            self.fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o644)
            if self.dir_fd is None:
                fcntl.flock(self.fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            owner = read_json_bytes(os.pread(self.fd, 4096, 0))
            if (isinstance(owner, dict) and owner.get("pid") != os.getpid()
                    and procs.owner_alive(owner)):
                raise _busy(folder, f"a live benchharness (pid {owner['pid']})")
            os.ftruncate(self.fd, 0)
            os.pwrite(self.fd, (json.dumps(procs.identity(os.getpid())) + "\n").encode(), 0)
        except BaseException as e:
            self._close()
            if isinstance(e, BlockingIOError):
                raise _busy(folder) from None
            raise

    def _close(self) -> None:
        for name in ("fd", "dir_fd"):
            fd = getattr(self, name)
            if fd is not None:
                try:
                    os.close(fd)  # closing the last descriptor releases its flock
                except OSError:
                    pass
                setattr(self, name, None)

    def release(self) -> None:
        if self.fd is not None:
            try:
                os.ftruncate(self.fd, 0)  # no owner any more
            except OSError:
                pass
        self._close()


def read_json_bytes(data: bytes):
    try:
        return json.loads(data.decode("utf-8", "replace").strip() or "null")
    except ValueError:
        return None


class Journal:
    """Append-only ``runs.jsonl`` with group-commit fsync from a background thread."""

    def __init__(self, folder: Path, sync_interval_s: float = 1.0):
        self.path = folder / "runs.jsonl"
        self.fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        # What was fsynced, by size: the harness and, for queued runs, the
        # launcher append to this file; a larger size means something to sync.
        self._synced_size = os.fstat(self.fd).st_size
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._interval = sync_interval_s
        self._thread = threading.Thread(target=self._syncer, name="journal-fsync", daemon=True)
        self._thread.start()
        self.inflight_fd = os.open(folder / "inflight", os.O_RDWR | os.O_CREAT, 0o644)

    def append(self, record: Mapping) -> None:
        """Append one record's line. On a failed write (a full disk) the part of
        the line already written is cut off again, so the journal holds whole
        lines only, and the error is raised."""
        line = encode_record(record)
        # One write(2) of the whole line; O_APPEND makes it land at the end.
        n = 0
        try:
            n = os.write(self.fd, line)
            while n < len(line):  # only on short writes (full disk, signals)
                n += os.write(self.fd, line[n:])
        except OSError as e:
            if n:
                cut_partial_line(self.fd, n)
            if e.filename is None:
                e.filename = str(self.path)
            raise

    def mark_inflight(self, run: int, pid: int, pgid: int, start=None) -> None:
        """Record the run now executing (overwritten in place; read by --resume).

        ``start``: (low, high) bounds of its first process's start time in clock
        ticks; read from /proc here when not given. A record without it is never
        acted on.
        """
        from benchharness.execute.procs import start_ticks

        if start is None:
            t = start_ticks(pgid)
            start = (t, t) if t is not None else None
        rec = {"run": run, "pid": pid, "pgid": pgid, "boot": boot_id()}
        if start is not None:
            rec["start"] = list(start)
        os.pwrite(self.inflight_fd, json.dumps(rec).encode().ljust(INFLIGHT_SIZE), 0)

    def clear_inflight(self) -> None:
        os.pwrite(self.inflight_fd, b" " * INFLIGHT_SIZE, 0)

    def _syncer(self) -> None:
        while not self._stop.wait(self._interval):
            self.sync()

    def sync(self) -> None:
        try:
            size = os.fstat(self.fd).st_size
        except OSError:  # pragma: no cover - closed under us at exit
            return
        if size != self._synced_size:
            with self._lock:
                try:
                    os.fsync(self.fd)
                    self._synced_size = size
                except OSError:  # pragma: no cover
                    pass

    def close(self) -> None:
        self._stop.set()
        self._thread.join(timeout=5)
        with self._lock:
            try:
                os.fsync(self.fd)
            except OSError:  # pragma: no cover
                pass
        os.close(self.fd)
        os.close(self.inflight_fd)


def cut_partial_line(fd: int, written: int) -> None:
    """Cut the last ``written`` bytes (a line whose write failed half way) off the file."""
    try:
        os.ftruncate(fd, os.fstat(fd).st_size - written)
    except OSError:  # pragma: no cover - then resume sets it aside as a torn line
        pass


def _json_default(obj):
    import numpy as np

    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, bytes):
        return obj.decode("utf-8", "replace")
    raise TypeError(f"cannot serialise {type(obj).__name__}")


def _make_line_encoder():
    """One compact JSON encoder reused for every journal line (NaN refused).

    ``json.dumps`` with non-default options builds a new encoder per call; the
    C encoder made once here gives the same text at a fraction of the cost.
    """
    from json import encoder as _enc

    if _enc.c_make_encoder is not None:
        c = _enc.c_make_encoder(None, _json_default, _enc.encode_basestring_ascii, None,
                                ":", ",", False, False, False)
        return lambda obj: "".join(c(obj, 0))
    e = json.JSONEncoder(separators=(",", ":"), allow_nan=False, default=_json_default)
    return e.encode


_encode_line = _make_line_encoder()

def encode_record(record: Mapping) -> bytes:
    """A record's journal line (compact JSON, newline-terminated)."""
    return (_encode_line(record) + "\n").encode("utf-8")


#: Usage figures the launcher renders with ``%r`` (floats); the others are counts.
_FLOAT_FIELDS = ("wall_s", "user_s", "sys_s")


def stream_line_format() -> str:
    """The measured part of a journal line, as a %-format the launcher fills.

    For a queued run that ended ok the launcher writes the line itself (see
    `benchharness.execute.launcher`): `record_head`, then this format applied to
    (exit code, wall seconds, the usage figures in `USAGE_FIELDS` order after
    ``wall_s``, start time), then the run's extra fields. The result is the line
    `Journal.append` would write for the same record.
    """
    parts = [',"exit_code":%d']
    for f in USAGE_FIELDS:
        parts.append(f',"{f}":%r' if f in _FLOAT_FIELDS else f',"{f}":%d')
    parts.append(',"started_at":"%s","message":""')
    return "".join(parts)


def record_head(run: Mapping, status: str) -> str:
    """A journal record's opening up to its status, without the closing brace."""
    head = {"run": run["run"], "position": run["position"], "block": run["block"],
            "replicate": run["replicate"], "levels": run["levels"], "status": status}
    return _encode_line(head)[:-1]

#: Bytes of the in-flight record (the launcher's `INFLIGHT_SIZE` is the same).
INFLIGHT_SIZE = 256


def boot_id() -> str:
    from benchharness.execute.procs import boot_id

    return boot_id()


def read_inflight(folder: Path) -> dict | None:
    try:
        text = (folder / "inflight").read_text().strip()
    except OSError:
        return None
    if not text:
        return None
    try:
        return json.loads(text)
    except json.JSONDecodeError:
        return None


def kill_leftover(folder: Path) -> str | None:
    """Kill the process group of a run a dead harness left running; returns what was done.

    Nothing is signalled unless it is the very process recorded (its start time
    and the boot match; `benchharness.execute.procs`): an id that passed to
    another process, another experiment's launcher, a record from an older
    version without identities, all are left alone. Raises `ResultsFolderError`
    when the harness named in the record is alive and still drives the launcher
    named there (its lock was removed): a folder is never taken from a live owner.
    """
    from benchharness.execute import procs

    info = read_inflight(folder)
    if not info or info.get("boot") != boot_id():
        return None
    harness, launcher = info.get("harness"), info.get("launcher")
    if (harness and harness != os.getpid() and procs.matches(harness, info.get("hstart"))
            and procs.matches(launcher, info.get("lstart"))
            and procs.parent_of(launcher) == harness):
        # That harness still drives its launcher: it is running this folder (its
        # lock must have been removed). A harness that merely lives on after its
        # run ended has closed its launcher and holds nothing.
        raise _busy(folder, f"a live benchharness (pid {harness})")
    # First the dead harness's launcher, if it still lives: it must not start
    # (or journal) anything once this harness reads the journal.
    _stop_launcher(info.get("launcher"), info.get("lstart"))
    return stop_run(info, "the earlier harness")


def stop_run(info: Mapping, whose: str) -> str | None:
    """SIGKILL the process group of an in-flight record if it is still the run's; a note."""
    from benchharness.execute import procs

    try:
        pgid = int(info.get("pgid") or 0)
    except (TypeError, ValueError):
        return None
    if pgid <= 1:
        return None
    start = info.get("start")
    run = info.get("run")
    if not (isinstance(start, list) and len(start) == 2):
        if procs.stat_fields(pgid) is None and not procs.group_members(pgid):
            return None
        return (f"process group {pgid} (run {run}) may have been left running by {whose}; it "
                "was not signalled: the record does not say which process it was (check with "
                f"`ps -o pid,lstart,args -g {pgid}`)")
    what = procs.kill_group_checked(pgid, start[0], start[1])
    if what == "killed":
        return f"stopped process group {pgid} left running by {whose} (run {run})"
    if what == "leaderless":
        return (f"process group {pgid} (run {run}) lost its first process; its other processes "
                "cannot be told apart from an unrelated group and were not signalled (check "
                f"with `ps -o pid,lstart,args -g {pgid}`)")
    return None  # gone, or the id now names another process: nothing of ours is left


def _stop_launcher(pid, start) -> None:
    """SIGKILL a launcher process (checked by its start time and command line) and wait
    until it is gone."""
    from benchharness.execute import procs

    try:
        pid = int(pid or 0)
    except (TypeError, ValueError):
        return
    if pid <= 1 or start is None or b"launcher.py" not in procs.cmdline(pid):
        return  # no such launcher, or no identity to check it by
    procs.kill_checked(pid, start, start, wait_s=5)


#: Keys every journal record has (`record_head` writes them first).
RECORD_KEYS = ("run", "levels", "status")


def _record_problem(rec) -> str | None:
    """Why a parsed journal line is not a run record, or None if it is one."""
    if type(rec) is not dict:
        text = json.dumps(rec)
        return f"the line holds {text[:40]!r}, not a run record"
    missing = [k for k in RECORD_KEYS if k not in rec]
    if missing:
        return "the record has no " + " and no ".join(repr(k) for k in missing)
    if type(rec["run"]) is not int:
        return f"the record's run id is {json.dumps(rec['run'])[:40]}, not a whole number"
    if type(rec["levels"]) is not dict:
        return "the record's 'levels' is not a mapping of factor to level"
    if type(rec["status"]) is not str:
        return "the record's 'status' is not a word"
    return None


def _parse_line(line: bytes):
    """``(record, None)`` or ``(None, what is wrong)`` for one complete journal line."""
    try:
        text = line.decode("utf-8")
    except UnicodeDecodeError:
        return None, "the line is not UTF-8 text"
    try:
        return json.loads(text), None
    except ValueError:
        pass
    try:
        first, end = json.JSONDecoder().raw_decode(text.lstrip())
    except ValueError as exc:
        return None, f"the line is not JSON ({str(exc).split(':')[0]})"
    rest = text.lstrip()[end:].strip()
    if type(first) is dict and rest.startswith("{"):
        col = len(text) - len(text.lstrip()) + end + 1
        return None, (f"two records run together on one line (a newline lost); put a newline "
                      f"at column {col} so that each record has its own line")
    return None, "the line holds something after its record"


def _fast_records(data: bytes) -> list | None:
    """All records of a journal of complete, valid, distinct lines (the usual case),
    parsed in one call; None when anything needs the line-by-line reading."""
    if not data.endswith(b"\n") or b"\n\n" in data or data.startswith(b"\n"):
        return None
    # A JSON string never holds a raw newline, so every newline ends a line.
    try:
        whole = json.loads(b"[" + data[:-1].replace(b"\n", b",") + b"]")
    except ValueError:
        return None
    runs = set()
    for r in whole:
        if (type(r) is not dict or type(r.get("run")) is not int
                or type(r.get("levels")) is not dict or type(r.get("status")) is not str):
            return None
        runs.add(r["run"])
    return whole if len(runs) == len(whole) else None


def read_journal(path: Path, repair: bool = False, notes: list | None = None) -> list[dict]:
    """All complete records of a journal, each run once.

    A torn last line (a write that did not finish) is ignored, or with
    ``repair`` moved to ``runs.jsonl.torn`` and cut off so appending can resume.
    A line that is not a run record (``1``, ``[]``, a record without ``run``,
    ``levels`` or ``status``, two records on one line) is an error naming the
    line and what to do: such a line is not what benchharness writes, and
    guessing what it meant could count a run twice or not at all. A line that
    repeats a run already read is set aside and never counted: the first record
    of each run is used; with ``repair`` the repeats are moved to
    ``runs.jsonl.duplicates`` (nothing is deleted). What was set aside is said
    in ``notes`` when a list is given.
    """
    if not path.exists():
        return []
    data = path.read_bytes()
    fast = _fast_records(data)
    if fast is not None:
        return fast
    records, bad, dups, kept, good_end = _scan_journal(data)
    if bad:
        _refuse_bad_lines(path, bad, len(records))
    torn_tail = good_end < len(data) and data[good_end:].strip()
    if dups:
        data, good_end = _set_aside_repeats(path, data, dups, kept, good_end, torn_tail,
                                            repair, notes)
    if torn_tail and repair:
        torn = path.with_name(path.name + ".torn")
        with open(torn, "ab") as fh:
            fh.write(data[good_end:] + b"\n")
        with open(path, "r+b") as fh:
            fh.truncate(good_end)
            os.fsync(fh.fileno())
    return records


def _scan_journal(data: bytes):
    """One pass over a journal's lines: ``(records, bad, repeats, kept lines, good_end)``.

    ``records``: the first record of each run; ``bad``: (line number, what is
    wrong) of lines that are not run records; ``repeats``: (line number, line,
    identical to the first) of lines repeating a run; ``good_end``: the byte
    offset after the last complete line. A last line without its newline, or an
    unreadable final line, is a write that did not finish and is left out.
    """
    records: list = []
    seen: dict[int, int] = {}           # run id -> index in records
    bad: list[tuple[int, str]] = []     # (line number, what is wrong)
    dups: list[tuple[int, bytes, bool]] = []  # (line number, line, identical to the first)
    kept: list[bytes] = []              # the lines kept, for a repair
    good_end = 0
    lines = data.split(b"\n")
    offset = 0
    for i, line in enumerate(lines):
        last = i == len(lines) - 1
        if line.strip():
            if last:  # no newline after it: a write that did not finish
                break
            rec, why = _parse_line(line)
            if why is None:
                why = _record_problem(rec)
            if (why is not None and rec is None and not why.startswith("two records")
                    and not b"\n".join(lines[i + 1:]).strip()):
                break  # an unreadable final line: treated as torn
            if why is not None:
                bad.append((i + 1, why))
            elif rec["run"] in seen:
                first = records[seen[rec["run"]]]
                dups.append((i + 1, line, first == rec))
            else:
                seen[rec["run"]] = len(records)
                records.append(rec)
                kept.append(line)
        offset += len(line) + 1
        if not last:
            good_end = offset
    return records, bad, dups, kept, good_end


def _refuse_bad_lines(path: Path, bad: list[tuple[int, str]], n_records: int) -> None:
    """Raise the error naming the first line that is not a run record (and a few others)."""
    n, why = bad[0]
    more = ""
    if len(bad) > 1:
        others = ", ".join(str(b[0]) for b in bad[1:6]) + (", ..." if len(bad) > 6 else "")
        more = f" (lines {others} too)"
    raise ResultsFolderError(
        f"{path}:{n}: {why}{more}" + (
            "" if why.startswith("two records") else
            f"; benchharness never writes such a line: move it out of the journal (into "
            f"{path.name}.bad, say)") + f", and run the command again; the {n_records} "
        "runs recorded on the other lines are kept")


def _set_aside_repeats(path: Path, data: bytes, dups, kept: list[bytes], good_end: int,
                       torn_tail, repair: bool, notes: list | None) -> tuple[bytes, int]:
    """Say which lines repeat a run; with ``repair`` move them to ``.duplicates`` and rewrite
    the journal without them. Returns the journal's bytes and good end as they now are."""
    same = sum(1 for d in dups if d[2])
    ids = sorted({json.loads(d[1])["run"] for d in dups})
    shown = ", ".join(map(str, ids[:8])) + (", ..." if len(ids) > 8 else "")
    kind = (f"{same} identical" if same == len(dups) else
            f"{same} identical, {len(dups) - same} with other values")
    where = "set aside"
    if repair:
        side = path.with_name(path.name + ".duplicates")
        with open(side, "ab") as fh:
            fh.write(b"".join(d[1] + b"\n" for d in dups))
            fh.flush()
            os.fsync(fh.fileno())
        body = b"".join(k + b"\n" for k in kept)
        write_atomic(path, body + (data[good_end:] if torn_tail else b""))
        data = path.read_bytes()
        good_end = len(body)
        where = f"moved to {side.name}"
    if notes is not None:
        notes.append(f"{path.name}: {plural(len(dups), 'line')} "
                     f"{'repeats' if len(dups) == 1 else 'repeat'} a run already recorded "
                     f"({kind}; run {shown}); {where} and not counted: the first record of "
                     "each run is used")
    return data, good_end


def runs_columns(factors: Sequence[str], records: Iterable[Mapping],
                 floor_kib: int | None = None) -> list[str]:
    """runs.csv's columns: fixed ones, factors, core figures, the memory-floor
    mark when the session measured a floor (`benchharness.measure.floor`),
    later capabilities' columns present in ``records``, metrics."""
    extra_present = []
    metric_names: list[str] = []
    for rec in records:
        for c in LATER_COLUMNS:
            if c in rec and c not in extra_present:
                extra_present.append(c)
        for m in rec.get("metrics") or {}:
            if m not in metric_names:
                metric_names.append(m)
    extras = [c for c in LATER_COLUMNS if c in extra_present]
    marks = [FLOOR_COLUMN] if floor_kib is not None else []
    return [*LEAD_COLUMNS, *factors, *CORE_COLUMNS, *marks, *extras, *metric_names]


def row_values(rec: Mapping, factors: Sequence[str], cols: Sequence[str],
               floor_kib: int | None = None) -> list:
    """One journal record as a ``runs.csv`` row, values in the order of ``cols``
    (as `runs_columns` gives them: fixed columns, factors, the floor mark,
    later columns, metrics)."""
    g = rec.get
    lv = g("levels") or {}
    row = list(map(g, LEAD_COLUMNS))
    row += map(lv.get, factors)
    row += map(g, CORE_COLUMNS)
    tail = cols[len(LEAD_COLUMNS) + len(factors) + len(CORE_COLUMNS):]
    if tail:
        mt = g("metrics") or {}
        for c in tail:
            if c in LATER_COLUMNS:
                row.append(g(c))
            elif c == FLOOR_COLUMN:
                row.append(at_floor(g("max_rss_kib"), floor_kib))
            else:
                row.append(mt.get(c))
    return row


def sorted_records(records: Iterable[Mapping]) -> list:
    """Journal records in execution order (position, then run id)."""
    return sorted(records, key=lambda r: (r.get("position", 0), r.get("run", 0)))


def _csv_value(v) -> str:
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return repr(v)
    return str(v)


class RunsCsvWriter:
    """``runs.csv`` written row by row into a temporary sibling, then put in place.

    `export_runs_csv` writes all rows at once; the runner also uses this while
    queued runs execute (rows are added as runs finish, off the path between
    runs), then `commit`s it if the columns and order turned out as expected.
    """

    def __init__(self, folder: Path, factors: Sequence[str], cols: Sequence[str],
                 floor_kib: int | None = None):
        self.path = folder / "runs.csv"
        self.floor_kib = floor_kib
        self.tmp = folder / "runs.csv.partial"
        self.factors = list(factors)
        self.cols = list(cols)
        self.fixed = len(LEAD_COLUMNS) + len(self.factors) + len(CORE_COLUMNS)
        self.fh = open(self.tmp, "w", encoding="utf-8", newline="")
        self.writer = csv.writer(self.fh, lineterminator="\n")  # None -> empty field
        self.writer.writerow(self.cols)

    def add(self, rec: Mapping) -> None:
        row = row_values(rec, self.factors, self.cols, self.floor_kib)
        # Only the later columns and the metrics can hold true/false (written as
        # such, not as Python's True/False); the fixed ones never do.
        # (Only those are converted: the csv writer renders every other value as
        # `_csv_value` would, and the floor mark is a bool in every row.)
        fixed = self.fixed
        if True in map(_is_bool, row[fixed:]):
            row[fixed:] = [_csv_value(v) if v.__class__ is bool else v for v in row[fixed:]]
        self.writer.writerow(row)

    def add_all(self, records: Iterable[Mapping]) -> None:
        for rec in records:
            self.add(rec)

    def commit(self) -> Path:
        self.fh.flush()
        os.fsync(self.fh.fileno())
        self.fh.close()
        os.replace(self.tmp, self.path)
        return self.path

    def discard(self) -> None:
        try:
            self.fh.close()
        except OSError:  # its buffer could not be written (a full disk): dropped anyway
            pass
        try:
            self.tmp.unlink()
        except OSError:
            pass


class JournalMirror:
    """The journal lines a stream added, as records, and as the text they should be.

    At the end the journal's new bytes are compared with that text (a read and
    a comparison, far cheaper than parsing the journal again); when they are
    the same the records serve the export of runs.csv. Kept only up to
    ``limit`` runs, so a very long experiment does not hold them all.
    """

    def __init__(self, path: Path, limit: int, factors=(), prior=(),
                 floor_kib: int | None = None):
        self.path = path
        self.floor_kib = floor_kib
        self.start = os.stat(path).st_size
        self.records: list | None = []
        self.lines: list = []
        self.limit = limit
        self.factors = list(factors)
        self.prior = list(prior)
        self.csv: RunsCsvWriter | None = None

    def add(self, rec: dict) -> None:
        if self.records is not None:
            if len(self.records) >= self.limit:
                self.drop()
                return
            self.records.append(rec)
            self.lines.append(encode_record(rec))
            try:
                if self.csv is None:
                    # runs.csv grows with the runs: its columns as the first run
                    # shows them (checked again at the end)
                    self.csv = RunsCsvWriter(
                        self.path.parent, self.factors,
                        runs_columns(self.factors, [*self.prior, rec], self.floor_kib),
                        self.floor_kib)
                    self.csv.add_all(self.prior)
                self.csv.add(rec)
            except OSError:
                self.drop()

    def drop(self) -> None:
        self.records = self.lines = None
        if self.csv is not None:
            self.csv.discard()
            self.csv = None

    def commit_csv(self, records: list) -> bool:
        """Put the runs.csv written along in place if it is what an export would write."""
        csv_w, self.csv = self.csv, None
        if csv_w is None:
            return False
        if (csv_w.cols == runs_columns(self.factors, records, self.floor_kib)
                and in_order(records)):
            try:
                csv_w.commit()
                return True
            except OSError:
                pass
        csv_w.discard()
        return False

    def verified(self) -> list | None:
        """The records, if the journal holds exactly their lines after ``start``."""
        if self.records is None:
            return None
        try:
            with open(self.path, "rb") as fh:
                fh.seek(self.start)
                data = fh.read()
        except OSError:
            return None
        return self.records if data == b"".join(self.lines) else None


def export_runs_csv(folder: Path, factors: Sequence[str], records: Sequence[Mapping],
                    floor_kib: int | None = None) -> Path:
    """Write ``runs.csv`` (one row per journal record, sorted by position) atomically;
    ``floor_kib``: the session's memory floor (adds the `FLOOR_COLUMN` mark)."""
    records = sorted_records(records)
    w = RunsCsvWriter(folder, factors, runs_columns(factors, records, floor_kib), floor_kib)
    try:
        w.add_all(records)
    except BaseException:
        w.discard()
        raise
    return w.commit()


def in_order(records: Sequence[Mapping]) -> bool:
    """Whether ``records`` are already in `sorted_records` order."""
    keys = [(r.get("position", 0), r.get("run", 0)) for r in records]
    return all(a <= b for a, b in zip(keys, keys[1:]))


def _is_bool(v) -> bool:
    return v.__class__ is bool


def write_plan_csv(folder: Path, factors: Sequence[str], rows: Sequence,
                   append: bool = False) -> None:
    """``plan.csv``: ``rows`` are dicts of its columns, or planned runs (objects with
    ``run``, ``position``, ``block``, ``replicate``, ``warmup`` and ``levels``),
    whose factor columns are formatted once per cell (a plan may hold a million)."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    cols = ["run", "position", "block", "replicate", "warmup", *factors]
    if not append:
        w.writerow(cols)
    rows = iter(rows)
    first = next(rows, None)
    if first is not None and not isinstance(first, Mapping):
        buf.write(_planned_lines(factors, itertools.chain([first], rows)))
    else:
        for row in itertools.chain([first] if first is not None else [], rows):
            w.writerow([_csv_value(row[c]) for c in cols])
    path = folder / "plan.csv"
    if append:
        with open(path, "a", encoding="utf-8") as fh:
            fh.write(buf.getvalue())
            fh.flush()
            os.fsync(fh.fileno())
    else:
        write_atomic(path, buf.getvalue())


def _planned_lines(factors: Sequence[str], runs) -> str:
    """``plan.csv`` lines of planned runs, as `csv.writer` writes them: each distinct
    label is formatted (quoted where needed) once, each cell's columns joined once."""
    buf = io.StringIO()
    cw = csv.writer(buf, lineterminator="\n")
    labels: dict = {}            # label -> its CSV field text
    parts: dict[int, str] = {}   # id of a cell's levels dict -> its factor columns

    def field(value) -> str:
        text = labels.get(value)
        if text is None:
            buf.seek(0)
            buf.truncate()
            cw.writerow([_csv_value(value), "x"])   # in a row of two, as in plan.csv
            text = labels[value] = buf.getvalue()[:-3]
        return text

    out = []
    get_part = parts.get
    for r in runs:
        lv = r.levels
        part = get_part(id(lv))
        if part is None:
            try:   # labels already formatted: plain look-ups (a plan may hold 100,000 cells)
                part = ",".join(["", *[labels[lv[f]] for f in factors]])
            except KeyError:
                part = "".join("," + field(lv[f]) for f in factors)
            parts[id(lv)] = part
        out.append(f"{r.run},{r.position},{r.block},{r.replicate},"
                   f"{'true' if r.warmup else 'false'}{part}\n")
    return "".join(out)


def read_plan_csv(folder: Path, factors: Sequence[str] | None = None) -> list[dict]:
    """The planned runs of ``plan.csv``; a damaged file is an error naming its line.

    ``factors``: the experiment's factor names, which must be the file's columns.
    """
    path = folder / "plan.csv"
    damaged = (f"; plan.csv lists the runs resume continues with: put back the file as "
               f"`benchharness run` wrote it (the runs recorded so far stay readable by "
               f"`benchharness analyze {folder}`)")
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            reader = csv.DictReader(fh)
            rows = list(reader)
            cols = reader.fieldnames or []
    except FileNotFoundError:
        raise ResultsFolderError(f"{folder}: no plan.csv; this is not a results folder "
                                 "benchharness can resume") from None
    except (UnicodeDecodeError, csv.Error) as exc:
        raise ResultsFolderError(f"{path}: damaged ({exc})" + damaged) from None
    fixed = ["run", "position", "block", "replicate", "warmup"]
    lacking = [c for c in [*fixed, *(factors or [])] if c not in cols]
    if lacking:
        raise ResultsFolderError(f"{path}:1: the header has no column {lacking[0]!r}" + damaged)
    extra = [c for c in cols if c not in fixed and factors is not None and c not in factors]
    if extra:
        raise ResultsFolderError(f"{path}:1: the column {extra[0]!r} is not a factor of "
                                 "experiment.yaml" + damaged)
    out = []
    runs = set()
    for n, r in enumerate(rows, 2):
        if None in r or any(v is None for v in r.values()):
            raise ResultsFolderError(f"{path}:{n}: the row does not have one value per column"
                                     + damaged)
        try:
            row = {"run": int(r.pop("run")), "position": int(r.pop("position")),
                   "block": int(r.pop("block")), "replicate": int(r.pop("replicate")),
                   "warmup": r.pop("warmup") == "true", "levels": r}
        except ValueError as exc:
            raise ResultsFolderError(f"{path}:{n}: {exc}" + damaged) from None
        if row["run"] in runs:
            raise ResultsFolderError(f"{path}:{n}: run {row['run']} is planned twice" + damaged)
        runs.add(row["run"])
        out.append(row)
    return out


def experiment_digest(text: str) -> str:
    """SHA-256 of the frozen experiment file's text (recorded in session.json)."""
    import hashlib

    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def read_session(folder: Path) -> dict:
    """``session.json`` of a folder to resume; a damaged one is an error saying what to do."""
    path = folder / "session.json"
    try:
        value = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ResultsFolderError(f"{path}: missing; it holds the seed and state resume needs, "
                                 "so this folder cannot be resumed (its runs stay readable by "
                                 f"`benchharness analyze {folder}`)") from None
    except (OSError, ValueError) as exc:
        why = getattr(exc, "strerror", None) or str(exc).split(":")[0]
        raise ResultsFolderError(f"{path}: damaged ({why}); it holds the seed and state resume "
                                 "needs: put back the file as `benchharness run` wrote it, or "
                                 "start afresh (the runs recorded so far stay readable by "
                                 f"`benchharness analyze {folder}`)") from None
    if not isinstance(value, dict):
        raise ResultsFolderError(f"{path}: damaged (not a JSON object); put back the file as "
                                 "`benchharness run` wrote it, or start afresh")
    return value


def check_frozen(folder: Path, exp, session: Mapping) -> None:
    """Refuse to resume when the frozen ``experiment.yaml`` changed since the start:
    the remaining runs would not be the experiment the first ones belong to."""
    want = session.get("experiment_sha256")
    if want and experiment_digest(exp.source_text) != want:
        raise ResultsFolderError(
            f"{folder / 'experiment.yaml'}: changed since this experiment started (its "
            "SHA-256 differs from the one in session.json); resume runs only what was "
            "planned: put back the file as it was run (to run something else, start a new "
            "experiment)")


def _probe_writable(folder: Path) -> None:
    """Raise OSError unless a file can be created in ``folder`` (also for root on a
    read-only mount, where permission bits say nothing)."""
    probe = folder / f".write-probe-{os.getpid()}"
    fd = os.open(probe, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    os.close(fd)
    os.unlink(probe)


def check_writable(folder: Path) -> None:
    """A folder to append to must be writable; say so plainly if it is not."""
    try:
        _probe_writable(folder)
        for name in ("runs.jsonl", "session.json"):
            if (folder / name).exists() and not os.access(folder / name, os.W_OK):
                raise PermissionError(13, "Permission denied", str(folder / name))
    except OSError as exc:
        import errno

        if is_disk_full(exc):
            raise  # said as such by the runner
        fix = (f"copy it to a writable place (cp -a {folder} NEW) and resume the copy"
               if exc.errno == errno.EROFS else
               f"make it writable (chmod -R u+w {folder}), or copy it elsewhere and resume "
               "the copy")
        raise ResultsFolderError(f"{folder}: cannot be written ({exc.strerror or exc}); resume "
                                 f"appends runs here: {fix}") from None


# ---------------------------------------------------------------------------
# Reading a finished (or interrupted) results folder.

@dataclass(frozen=True)
class Results:
    path: Path
    experiment: object  # benchharness.experiment.file.Experiment
    runs: object        # pandas.DataFrame, as runs.csv
    host: dict
    plan: object        # pandas.DataFrame of plan.csv
    session: dict
    records: tuple = ()  # the journal's records in execution order (as read once)
    notes: tuple = ()    # what reading set aside or could not use (one sentence each)


def is_results_folder(path: str | os.PathLike) -> bool:
    p = Path(path)
    return p.is_dir() and (p / "experiment.yaml").exists() and (
        (p / "runs.jsonl").exists() or (p / "runs.csv").exists())


def load_results(folder: str | os.PathLike) -> Results:
    """Read a results folder. Runs come from the journal (so an interrupted
    folder reads too); factor columns are strings in the experiment's level order."""
    import pandas as pd

    from benchharness.experiment.file import load_experiment

    p = Path(folder)
    if not is_results_folder(p):
        raise ResultsFolderError(f"{p}: not a results folder (needs experiment.yaml and "
                                 "runs.jsonl)")
    exp = load_experiment(p / "experiment.yaml")
    notes: list[str] = []
    records = sorted_records(read_journal(p / "runs.jsonl", notes=notes))
    factors = list(exp.factor_names)
    check_levels(p, exp, records)
    session = _read_json(p / "session.json")
    floor = session_floor_kib(session)
    cols = runs_columns(factors, records, floor)
    runs = pd.DataFrame([row_values(r, factors, cols, floor) for r in records], columns=cols)
    for f in factors:
        runs[f] = pd.Categorical(runs[f].astype("string").astype(object),
                                 categories=list(exp.levels_of(f)))
    host = _read_json(p / "host.json")
    if (p / "session.json").exists() and not session:
        notes.append("session.json is damaged (not a JSON object); the runs are read without "
                     "it, but `run --resume` needs it")
    try:
        plan = pd.read_csv(p / "plan.csv", dtype={f: str for f in factors},
                           keep_default_na=False)
    except FileNotFoundError:
        plan = pd.DataFrame()
    except (ValueError, UnicodeDecodeError, pd.errors.ParserError, pd.errors.EmptyDataError):
        plan = pd.DataFrame()
        notes.append("plan.csv is damaged; the runs are read without it, but `run --resume` "
                     "needs it")
    # what the reading set aside reaches the analysis' notes (`prepare`)
    runs.attrs["journal_notes"] = list(notes)
    return Results(path=p, experiment=exp, runs=runs, host=host, plan=plan, session=session,
                   records=tuple(records), notes=tuple(notes))


def check_levels(folder: Path, exp, records) -> None:
    """Every record's levels are levels the frozen experiment lists.

    A frozen ``experiment.yaml`` edited after the runs (a level renamed or
    dropped, a factor added) would otherwise turn those runs into missing
    values without a word.
    """
    known = {f.name: set(exp.levels_of(f.name)) for f in exp.factors}
    for r in records:
        lv = r["levels"]
        for f, labels in known.items():
            v = lv.get(f)
            if v is None:
                raise ResultsFolderError(
                    f"{folder / 'experiment.yaml'}: run {r['run']} was recorded without the "
                    f"factor {f!r}; experiment.yaml was changed after the runs (a factor "
                    "added); put back the file as it was run")
            if v not in labels:
                raise ResultsFolderError(
                    f"{folder / 'experiment.yaml'}: run {r['run']} was recorded with the level "
                    f"{v!r} of {f!r}, which experiment.yaml does not list (it lists "
                    f"{', '.join(sorted(labels))}); the file was changed after the runs; put "
                    "that level back")


def _read_json(path: Path) -> dict:
    try:
        value = json.loads(path.read_text())
    except (OSError, ValueError):
        return {}
    return value if isinstance(value, dict) else {}
