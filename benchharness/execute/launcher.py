"""The launcher: a small stdlib-only process that starts, watches and measures runs.

The harness starts this module as a separate Python process (``python -I -S
launcher.py RFD WFD``) and talks to it over a pair of pipes with length-prefixed
``marshal`` frames (4-byte big-endian length, then the marshalled dict of
plain values). It must stay
importable without the benchharness package and without anything but the
standard library, and it imports as little as it can (``marshal`` rather than
``pickle``, no ``datetime``): it is deliberately tiny, because on Linux a child's
``ru_maxrss`` includes the peak resident size of the address space it was
spawned from (the kernel folds the old mm's high-water mark into the signal
struct at exec). A child spawned by this ~10 MiB process therefore reports its
own peak, not the hundreds of megabytes a harness with pandas loaded may hold.

Per run the launcher:

* makes nothing but the child: no shell unless the request carries a shell
  command, stdin from ``/dev/null``, stdout and stderr into pipes read
  concurrently into bounded tail buffers (``capture_bytes`` each);
* spawns with ``os.posix_spawn`` in a new process group, or with fork+exec when
  child-side setup is asked for (CPU affinity, niceness, ASLR off via
  ``personality(ADDR_NO_RANDOMIZE)``);
* times the run with ``time.perf_counter_ns`` immediately around spawn and the
  moment its exit is signalled (SIGCHLD through a ``signalfd`` made once, or a
  pidfd per run where there is none; a blocking ``poll``, not a polling loop,
  and a ``timerfd`` for a time limit), then reaps it with ``os.wait4`` for its
  resource usage;
* on timeout kills the run's whole tree: its process group and every descendant
  that left it (``setsid``); the launcher is a child subreaper
  (``prctl(PR_SET_CHILD_SUBREAPER)``) so such escapees stay below it and are
  found through ``/proc/<pid>/task/<tid>/children``. SIGTERM first, SIGKILL after
  a short grace;
* reaps orphans that were re-parented to it and adds their resource usage to
  the run that produced them.

If the harness goes away (its end of the request pipe closes) during a run, the
launcher kills that run's tree and exits.

**Queued runs.** Besides one request at a time on the request pipe, the
harness may send batches of runs on a third pipe (the queue). The launcher runs
them back to back with no round trip between runs: for a run that ends ``ok``
it appends the run's journal line to ``runs.jsonl`` itself (the harness sends
the line's fixed part, and a format for the measured part, in the batch), with
one ``write`` before the next run starts; it then posts a short ``done`` frame
the harness reads when it next looks. Any other outcome (failure, timeout, a
value it cannot render) is not written: the launcher sends the full reply and
holds the queue until the harness has recorded the run and answers
``resume``. Between queued runs it checks the request pipe without blocking,
so a harness that went away or asked to ``drop`` the queue starts no further
run. The harness's own background thread fsyncs the journal.
"""

import gc
import marshal
import mmap
import os
import select
import sys

import _signal as signal  # the C module: `signal` would pull in enum and functools
import time

HEADER_SIZE = 4
F_SETPIPE_SZ = 1031
PIPE_SIZE = 1 << 20   # queue and reply pipes are widened to this where allowed
INFLIGHT_SIZE = 256   # bytes of the in-flight record, padded with spaces
INFLIGHT_WIDTHS = (10, 7, 7, 12, 12)  # run id, pid, pgid, start bounds: fixed widths
CONDITIONS_EVERY_NS = 10_000_000  # runs starting this close share one reading
DONE_BATCH = 64       # journalled runs reported to the harness at once, at most
DONE_EVERY_NS = 20_000_000  # ... and at least this often while runs go on
PR_SET_CHILD_SUBREAPER = 36
ADDR_NO_RANDOMIZE = 0x0040000
PERSONALITY_QUERY = 0xFFFFFFFF
OUTPUT_PIPE_SIZE = 1 << 20  # the run's stdout and stderr pipes, where allowed
TAIL_MIN = 1 << 18    # bytes of each output ring at least (reads of a loud command)
BYTEORDER = sys.byteorder


# ---------------------------------------------------------------- framing

def send(fd, obj):
    """Write one frame (length + marshal) to ``fd``; raises OSError if the peer is gone."""
    data = marshal.dumps(obj)
    view = memoryview(len(data).to_bytes(HEADER_SIZE, "big") + data)
    while view:
        n = os.write(fd, view)
        view = view[n:]


class FrameReader:
    """Buffered frame reader: one ``read`` usually brings a whole frame."""

    def __init__(self, fd):
        self.fd = fd
        self.buf = bytearray()

    def read(self):
        """The next frame's value; None at end of file."""
        buf = self.buf
        while len(buf) < HEADER_SIZE:
            chunk = os.read(self.fd, 1 << 16)
            if not chunk:
                return None
            buf += chunk
        end = HEADER_SIZE + int.from_bytes(buf[:HEADER_SIZE], "big")
        while len(buf) < end:
            chunk = os.read(self.fd, max(1 << 16, end - len(buf)))
            if not chunk:
                return None
            buf += chunk
        body = bytes(buf[HEADER_SIZE:end])
        del buf[:end]
        return marshal.loads(body)

    def has_frame(self):
        """Whether a whole frame is already buffered (readable with no system call)."""
        buf = self.buf
        return (len(buf) >= HEADER_SIZE
                and len(buf) >= HEADER_SIZE + int.from_bytes(buf[:HEADER_SIZE], "big"))


def widen_pipe(fd, size=PIPE_SIZE):
    """Ask for a larger pipe buffer (1 MiB: the default 64 KiB fills with a few
    replies, and makes a loud command wait for its reader 16 times as often)."""
    try:
        import fcntl
        fcntl.fcntl(fd, F_SETPIPE_SZ, size)
    except (ImportError, OSError):
        pass


_SECOND = [None, ""]  # the last whole second formatted, and its text up to the dot


def utc_now_iso():
    """Current UTC time, ISO 8601 with microseconds (``2026-01-31T23:59:59.123456+00:00``).

    The date and time up to the second are formatted once per second (a run
    of a short command otherwise spends longer here than in a system call).
    """
    ns = time.time_ns()
    sec = ns // 1_000_000_000
    if sec != _SECOND[0]:
        t = time.gmtime(sec)
        _SECOND[1] = (f"{t.tm_year:04d}-{t.tm_mon:02d}-{t.tm_mday:02d}T{t.tm_hour:02d}:"
                      f"{t.tm_min:02d}:{t.tm_sec:02d}.")
        _SECOND[0] = sec
    return f"{_SECOND[1]}{(ns // 1000) % 1_000_000:06d}+00:00"


# ---------------------------------------------------------------- run conditions

def _read_text(path):
    try:
        with open(path, "rb") as f:
            return f.read().decode("ascii", "replace").strip()
    except OSError:
        return None


def cpu_mhz_from(freq_files, cpus, cache):
    """Current CPU frequency in MHz, mean over ``cpus`` (None: all), or None.

    ``freq_files`` maps CPU number to its cpufreq ``scaling_cur_freq`` file
    (kHz). Where there are none (or none readable) the ``cpu MHz`` lines of
    /proc/cpuinfo are used, re-read at most once a second because generating
    that file is costly; ``cache`` is a two-item list ``[monotonic time,
    per-CPU values]`` the caller keeps between calls. `benchharness.measure.host` uses
    this same function for its own readings.
    """
    vals = []
    for c, path in freq_files.items():
        if cpus is not None and c not in cpus:
            continue
        v = _read_text(path)
        if v and v.isdigit():
            vals.append(int(v) / 1000.0)
    if not vals:
        now = time.monotonic()
        if now - cache[0] >= 1.0:
            per = []
            for line in (_read_text("/proc/cpuinfo") or "").splitlines():
                if line.lower().startswith("cpu mhz"):
                    try:
                        per.append(float(line.split(":", 1)[1]))
                    except ValueError:
                        pass
            cache[0], cache[1] = now, per
        per_cpu = cache[1]
        if cpus is not None:
            per_cpu = [per_cpu[c] for c in cpus if c < len(per_cpu)]
        vals = per_cpu
    return round(sum(vals) / len(vals), 1) if vals else None


def load_1m():
    try:
        return round(os.getloadavg()[0], 3)
    except OSError:
        return None


def _json_value(v):
    """JSON text of a plain value, or None when it needs the harness's encoder."""
    if v is None:
        return "null"
    if v is True:
        return "true"
    if v is False:
        return "false"
    t = type(v)
    if t is int:
        return str(v)
    if t is float:
        return repr(v) if v == v and v not in (float("inf"), float("-inf")) else None
    if t is str and v.isascii() and v.isprintable() and '"' not in v and "\\" not in v:
        return '"' + v + '"'
    return None


# ---------------------------------------------------------------- helpers

def _libc():
    try:
        import ctypes
        return ctypes.CDLL(None, use_errno=True), ctypes
    except Exception:  # pragma: no cover - ctypes missing on an odd build
        return None, None


def _resolve(cmd, env, cwd):
    """Find the executable for ``cmd`` using the child's PATH; (path, error)."""
    if "/" in cmd:
        path = cmd if os.path.isabs(cmd) else os.path.join(cwd, cmd)
        if not os.path.exists(path):
            return None, f"cannot start {cmd!r}: no such file"
        if os.path.isdir(path):
            return None, f"cannot start {cmd!r}: it is a directory"
        if not os.access(path, os.X_OK):
            return None, f"cannot start {cmd!r}: not executable (permission denied)"
        return path, None
    search = env.get("PATH", os.defpath)
    for d in search.split(os.pathsep):
        d = d or "."
        cand = os.path.join(d if os.path.isabs(d) else os.path.join(cwd, d), cmd)
        if os.path.isfile(cand) and os.access(cand, os.X_OK):
            return cand, None
    return None, f"cannot start {cmd!r}: command not found in the run's PATH"


SPAWN_SIGDEF = (signal.SIGPIPE, signal.SIGXFSZ)  # default in the child (Python ignores them)


def _spawn_error(argv, e):
    """Why ``posix_spawn`` refused ``argv``: an OSError's reason, or a bad
    argument's (a NUL byte: ValueError)."""
    if isinstance(e, OSError):
        return f"cannot start {argv[0]!r}: {e.strerror or e}"
    return f"cannot start {argv[0]!r}: {e}"


def _result(started_at, extra, status, message, conditions=None):
    """The reply for a run that could not be started."""
    return {"op": "done", "started_at": started_at, "status": status, "exit_code": None,
            "wall_ns": None, "rusage": None, "stdout": b"", "stderr": b"", "extra": extra,
            "message": message, "conditions": conditions}


_SIGNAMES = {getattr(signal, n): n for n in dir(signal)
             if n.startswith("SIG") and not n.startswith("SIG_") and isinstance(getattr(signal, n), int)}


def _signame(num):
    return _SIGNAMES.get(num, f"signal {num}")


def _tail_text(data, limit=300):
    """The last few lines of ``data`` as one short line (for messages)."""
    text = data.decode("utf-8", "replace").strip()
    if not text:
        return ""
    lines = [ln.strip() for ln in text.splitlines() if ln.strip()]
    out = " | ".join(lines[-5:])
    if len(out) > limit:
        out = "..." + out[-(limit - 3):]
    return out


CLOCK_BOOTTIME = getattr(time, "CLOCK_BOOTTIME", time.CLOCK_MONOTONIC)


def _start_ticks(pid):
    """Start time of ``pid`` in clock ticks after boot (field 22 of /proc/PID/stat), or None."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as f:
            stat = f.read()
        return int(stat[stat.rfind(b")") + 2:].split()[19])
    except (OSError, IndexError, ValueError):
        return None


def _is_zombie(pid):
    try:
        with open(f"/proc/{pid}/stat", "rb") as f:
            stat = f.read()
    except OSError:
        return True
    # state follows the parenthesised command name, which may contain ") ".
    return stat[stat.rfind(b")") + 2:stat.rfind(b")") + 3] in (b"Z", b"X")


class Tail:
    """The last bytes of one output stream, kept in a ring that reads go straight into.

    Each wake-up reads the pipe until it is empty (a read that returns less
    than asked for says so; no extra call to learn it) with ``readv`` into the
    ring's two parts, so a command that floods its output costs no memory and
    no copy beyond the read itself. The ring is anonymous memory: its pages
    become resident only when output arrives and are given back after a loud
    run, because the launcher's resident size is every later run's memory
    floor.
    """

    __slots__ = ("ring", "view", "size", "pos", "total")

    def __init__(self, cap):
        self.size = max(cap, TAIL_MIN)
        self.ring = mmap.mmap(-1, self.size)
        self.view = memoryview(self.ring)
        self.pos = self.total = 0

    def fill(self, fd):
        """Read what ``fd`` holds; False at end of file (or on a read error)."""
        view, size = self.view, self.size
        while True:
            pos = self.pos
            try:
                n = os.readv(fd, (view[pos:], view[:pos]) if pos else (view,))
            except BlockingIOError:
                return True
            except OSError:
                return False
            if not n:
                return False
            self.total += n
            self.pos = (pos + n) % size
            if n < size:
                return True

    def take(self, cap):
        """The last ``cap`` bytes read since the last call (the ring is emptied)."""
        total = self.total
        if not total:
            return b""
        pos, size = self.pos, self.size
        n = min(cap, total, size)
        if pos >= n:
            data = bytes(self.view[pos - n:pos])
        else:
            data = bytes(self.view[size - (n - pos):]) + bytes(self.view[:pos])
        if total > 2 * mmap.PAGESIZE:
            self.ring.madvise(mmap.MADV_DONTNEED)  # back to zero resident pages
        self.pos = self.total = 0
        return data


class Run:
    """One run's state between the steps of `Launcher.run`."""

    __slots__ = ("req", "started_at", "conditions", "extra", "argv", "env", "cwd", "key",
                 "path", "cap", "tails", "open_pipes", "pid", "pidfd", "t0", "t1", "deadline",
                 "start", "linger_end", "timed_out", "aborted", "status_word", "rusage", "orphans",
                 "kids", "timer", "linger_ns")

    def __init__(self, req):
        self.req = req
        self.extra = {}
        self.conditions = self.pid = self.pidfd = self.t1 = self.deadline = None
        self.linger_end = self.aborted = self.status_word = self.rusage = self.kids = None
        self.timed_out = self.timer = False
        self.orphans = []

    def failed(self, message):
        """The reply for a run that could not be started."""
        return _result(self.started_at, self.extra, "failed", message, self.conditions)


def _with_orphans(usage, orphans):
    """The run's usage figures with those of its reaped orphans added (the
    peak is the largest single process, the rest are sums)."""
    u = list(usage)
    for o in orphans:
        u[0] += o.ru_utime
        u[1] += o.ru_stime
        u[2] = max(u[2], o.ru_maxrss)
        u[3] += o.ru_minflt
        u[4] += o.ru_majflt
        u[5] += o.ru_nvcsw
        u[6] += o.ru_nivcsw
        u[7] += o.ru_inblock
        u[8] += o.ru_oublock
    return tuple(u)


class Launcher:
    def __init__(self, rfd, wfd, qfd=None):
        self.rfd = rfd
        self.reader = FrameReader(rfd)
        self.wfd = wfd
        os.set_inheritable(rfd, False)
        os.set_inheritable(wfd, False)
        # queued runs (see the module docstring)
        self.qfd = qfd
        self.qreader = FrameReader(qfd) if qfd is not None else None
        if qfd is not None:
            os.set_inheritable(qfd, False)
        self.queue = []          # requests still to run, in order (popped from the front)
        self.qpos = 0
        self.held = False        # a queued run the harness must record first
        self.pending_msg = None  # a request-pipe message that arrived during a run
        self.journal_path = None
        self.journal_fd = None
        self.line_format = None
        self.fast_format = self.line_tail = self.tail_fields = None
        self.freq_files = {}
        self.cpuinfo_cache = [-1.0, []]
        self.last_conditions = None  # (when, cpus, {load_1m, cpu_mhz}, their JSON text)
        self.done = []           # journalled queued runs the harness has not heard of
        self.done_since = 0
        self.collected_at = time.monotonic()
        self.idle = select.poll()
        self.idle.register(rfd, select.POLLIN)
        if qfd is not None:
            self.idle.register(qfd, select.POLLIN)
        self.pid = os.getpid()
        # Identities recorded beside process ids (benchharness.execute.procs):
        # start times in clock ticks after boot, ours and the harness's.
        self.tick_ns = 1_000_000_000 // (os.sysconf("SC_CLK_TCK") or 100)
        self.start = _start_ticks(self.pid)
        self.harness = os.getppid()
        self.harness_start = _start_ticks(self.harness)
        self.cwd0 = os.getcwd()
        self.devnull = os.open(os.devnull, os.O_RDWR | os.O_CLOEXEC)
        # A run inherits its standard streams from ours (see `_pipes`): stdin
        # is /dev/null; our own messages (a traceback) go to a copy of the
        # stderr we were given.
        os.dup2(self.devnull, 0)
        try:
            sys.stderr = open(os.dup(2), "w", buffering=1)
        except OSError:
            pass
        self.libc, self.ctypes = _libc()
        self.subreaper = False
        if self.libc is not None:
            self.subreaper = self.libc.prctl(PR_SET_CHILD_SUBREAPER, 1, 0, 0, 0) == 0
        self.aslr_control, self.aslr_reason = self._probe_personality()
        self.sigfd, self.sigmask0 = self._make_sigfd()
        # Writing "5" to clear_refs resets the peak-RSS mark of our address
        # space, so children spawned from it start from our current size only.
        try:
            self.clear_refs = os.open("/proc/self/clear_refs", os.O_WRONLY | os.O_CLOEXEC)
        except OSError:
            self.clear_refs = None
        self.children_path = f"/proc/{self.pid}/task/{self.pid}/children"
        self.children_fd = None
        self.inflight_maps = {}  # (path, inode) -> [shared mapping, template, boot, last length]
        self.env = {}
        self.resolved = {}  # (command, PATH, cwd) -> executable path
        self.leftovers = set()   # live descendants that earlier runs left behind
        self.to_close = []       # fds of the last run, closed after its reply
        self.pipes = None        # (out_r, out_w, err_r, err_w) kept between runs
        self.pipe_poller = None  # poll object of those pipes and the request pipe
        self.tail_size = 0       # the output rings (`Tail`), made for the first run
        self.out_tail = self.err_tail = None
        self.stop = False
        self.timer_fd = None     # a timerfd for runs with a time limit (`arm_timer`)
        self.timer_spec = self.timer_settime = None

    # ---- capabilities

    def _make_sigfd(self):
        """(signalfd for SIGCHLD, the signal mask we were started with), or
        (None, that mask) where one cannot be made.

        A run's exit wakes the launcher through this one descriptor, made once,
        rather than through a pidfd per run: ``pidfd_open`` and registering it
        lay inside the timed window, and closing it cost about 4 us between
        runs (measured with ``perf_counter_ns`` stamps over 2,000 queued runs
        of ``/bin/true``). SIGCHLD is blocked in the launcher (so it queues for
        the signalfd) and every run is started with the mask we were given.
        """
        mask0 = signal.pthread_sigmask(signal.SIG_BLOCK, ())
        libc, ct = self.libc, self.ctypes
        if libc is None:
            return None, mask0
        try:
            sigset = (ct.c_ubyte * 128)()
            if libc.sigemptyset(sigset) or libc.sigaddset(sigset, signal.SIGCHLD):
                return None, mask0
            signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGCHLD})
            fd = libc.signalfd(-1, sigset, os.O_NONBLOCK | os.O_CLOEXEC)
        except (AttributeError, OSError, TypeError, ValueError):
            fd = -1
        if fd < 0:
            signal.pthread_sigmask(signal.SIG_SETMASK, mask0)
            return None, mask0
        return fd, mask0

    def child_exited(self, pid):
        """After the signalfd woke us: 1 if a SIGCHLD it held says ``pid``
        ended, 2 if ``pid`` has ended nonetheless (its signal merged into one
        already pending), 0 if it still runs (the signal was another child's:
        an orphan re-parented to us)."""
        # One struct signalfd_siginfo (128 bytes) at a time: usually the only
        # one, the run's own (a larger read costs a 4 KiB buffer cut down
        # again); any others are drained in `settle`.
        fd = self.sigfd
        while True:
            try:
                data = os.read(fd, 128)
            except OSError:
                break
            if len(data) < 16:
                break
            # ssi_code at bytes 8-11 (CLD_EXITED, _KILLED or _DUMPED), ssi_pid at 12-15
            if data[8] < 4 and int.from_bytes(data[12:16], BYTEORDER) == pid:
                return 1
        try:
            return 2 if os.waitid(os.P_PID, pid, os.WEXITED | os.WNOHANG | os.WNOWAIT) else 0
        except ChildProcessError:
            return 2

    def drain_signals(self):
        """Forget SIGCHLDs already noted (a killed tree's orphans), so they do
        not wake the next run's wait."""
        if self.sigfd is not None:
            try:
                while os.read(self.sigfd, 128 * 32):
                    pass
            except OSError:
                pass

    def _probe_personality(self):
        if self.libc is None:
            return False, "ctypes is not available"
        p = self.libc.personality(PERSONALITY_QUERY)
        if p == -1:
            return False, os.strerror(self.ctypes.get_errno())
        if self.libc.personality(p | ADDR_NO_RANDOMIZE) == -1:
            return False, os.strerror(self.ctypes.get_errno())
        self.libc.personality(p)
        return True, ""

    def conditions(self, cpus):
        """The machine's load and CPU clock for a run about to start.

        Read just before the spawn (the launcher does nothing between spawn and
        wait that it can do before: on one CPU with the child, that work would
        delay it). Runs that start within `CONDITIONS_EVERY_NS` of the last
        reading with the same CPUs share it: the kernel updates the load
        average every 5 s, and reading the clock of each CPU per run would cost
        short runs more than it tells.
        """
        now = time.perf_counter_ns()
        last = self.last_conditions
        if last is not None and now - last[0] < CONDITIONS_EVERY_NS and last[1] == cpus:
            return last[2]
        cond = {"load_1m": load_1m(),
                "cpu_mhz": cpu_mhz_from(self.freq_files, cpus, self.cpuinfo_cache)}
        load, mhz = cond["load_1m"], cond["cpu_mhz"]
        # ... and their journal text, made once per reading
        text = ("null" if load is None else repr(float(load)),
                "null" if mhz is None else repr(float(mhz)))
        self.last_conditions = (now, cpus, cond, text)
        return cond

    def inflight_slot(self, inflight):
        """(entry, run id), or None if the file cannot be mapped; the entry,
        kept per file, is ``[shared mapping of the in-flight file, record
        template, boot id, length of the last record stored]``. The template is
        bytes with five ``%d`` (run id, the child's pid and process group, the
        bounds of its start time), made once per file and boot: numbers right-aligned in fixed widths
        (JSON allows the spaces), so records are all of one length
        and the store after the spawn is one format and one copy (see
        `launch`).

        The launcher records each running child there (for a later resume), by
        a store into the mapping: the page cache is what a resume reads, and a
        store costs no system call (a ``pwrite`` per run also updated the file's
        times on disk). Beside each id goes what identifies its process
        (`benchharness.execute.procs`): the boot, the child's start time as the
        boot clock read just before and just after the spawn (in clock ticks,
        the unit of ``/proc/PID/stat``), and the start times of the launcher
        and of the harness, so that a later resume signals none of them unless
        it is that very process.
        """
        path, run_id, boot = inflight[:3]
        key = (inflight[0], *inflight[3:])  # path and, when given, the file's inode number
        maps = self.inflight_maps
        m = maps.get(key)
        if m is not None and m[2] == boot:
            return m, run_id
        if m is None:
            for old in maps.values():  # one folder at a time: release the last one
                old[0].close()
            maps.clear()
            try:
                fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o644)
                try:
                    if os.fstat(fd).st_size < INFLIGHT_SIZE:
                        os.pwrite(fd, b" " * INFLIGHT_SIZE, 0)
                    m = mmap.mmap(fd, INFLIGHT_SIZE)
                finally:
                    os.close(fd)
            except (OSError, ValueError):
                return None  # the record helps a later resume; the run itself goes on
        else:
            m = m[0]
        text = ('{"run":%%%dd,"pid":%%%dd,"pgid":%%%dd,"start":[%%%dd,%%%dd],"boot":"%s",'
                '"launcher":%d,"lstart":%d,"harness":%d,"hstart":%d}'
                % (*INFLIGHT_WIDTHS, boot, self.pid, self.start or -1, self.harness,
                   self.harness_start or -1)).encode("ascii", "replace")
        if len(text % tuple(10 ** w - 1 for w in INFLIGHT_WIDTHS)) > INFLIGHT_SIZE:
            maps.pop(key, None)
            m.close()  # an odd boot id: no record rather than a cut one
            return None
        entry = maps[key] = [m, text, boot, -1]  # ..., length of the last record stored
        return entry, run_id

    def memory_floor(self):
        """The peak resident size (KiB) a run that uses almost no memory records.

        On Linux a child's ``ru_maxrss`` starts from the resident size of the
        address space it was spawned from: ours, its peak mark reset before
        each spawn. A program smaller than the launcher therefore records the
        launcher's size. Measured the way a run is made: the mark reset, a
        do-nothing program (``true``) spawned and reaped, its ``ru_maxrss``
        taken; where there is no such program, our own resident size
        (``VmRSS``). First the C heap's free memory is given back to the
        system (``malloc_trim``; compiling this module leaves about 2 MiB of
        it), so the floor is as low as it can cheaply be.
        """
        trim = getattr(self.libc, "malloc_trim", None)
        if trim is not None:
            trim(0)
        if self.clear_refs is not None:
            try:
                os.write(self.clear_refs, b"5")
            except OSError:
                pass
        for true in ("/bin/true", "/usr/bin/true"):
            try:
                pid = os.posix_spawn(true, [true], {}, setpgroup=0,
                                     setsigmask=self.sigmask0, file_actions=[
                    (os.POSIX_SPAWN_DUP2, self.devnull, fd) for fd in (0, 1, 2)])
                _, status, ru = os.wait4(pid, 0)
            except OSError:
                continue
            self.drain_signals()  # its SIGCHLD must not wake the first run's wait
            if status == 0 and ru.ru_maxrss > 0:
                return {"kib": ru.ru_maxrss, "how": f"{true} started by the launcher"}
        try:
            with open("/proc/self/status", "rb") as f:
                for line in f:
                    if line.startswith(b"VmRSS:"):
                        return {"kib": int(line.split()[1]),
                                "how": "the launcher's resident size (VmRSS)"}
        except (OSError, ValueError, IndexError):
            pass
        return None

    def hello(self):
        try:
            os.close(os.pidfd_open(self.pid))
            pidfd = ""
        except (AttributeError, OSError) as e:
            pidfd = str(e) or type(e).__name__
        return {"op": "hello", "pid": self.pid, "start": self.start,
                "subreaper": self.subreaper, "pidfd_error": pidfd,
                "aslr_control": self.aslr_control, "aslr_reason": self.aslr_reason,
                "memory_floor": self.memory_floor(),
                "children_file": os.path.exists(f"/proc/{self.pid}/task/{self.pid}/children")}

    # ---- process tree

    def descendants(self):
        """Every live descendant pid of the launcher (zombies excluded).

        Processes that earlier runs left behind, and their own descendants,
        are not part of the current run and are skipped.
        """
        out = []
        todo = [self.pid]
        seen = set()
        while todo:
            p = todo.pop()
            try:
                tids = os.listdir(f"/proc/{p}/task")
            except OSError:
                continue
            for tid in tids:
                try:
                    with open(f"/proc/{p}/task/{tid}/children", "rb") as f:
                        kids = f.read().split()
                except OSError:
                    continue
                for k in kids:
                    k = int(k)
                    if k not in seen and k not in self.leftovers:
                        seen.add(k)
                        todo.append(k)
        for k in seen:
            if not _is_zombie(k):
                out.append(k)
        return out

    def own_children(self):
        """Set of our direct children (zombies included); None if unreadable.

        The file stays open; a read at offset 0 regenerates its content.
        """
        fd = self.children_fd
        try:
            if fd is None:
                fd = self.children_fd = os.open(self.children_path, os.O_RDONLY | os.O_CLOEXEC)
            data = os.pread(fd, 1 << 16, 0)
        except OSError:
            return None
        return {int(x) for x in data.split()} if data else set()

    def reap_orphans(self, run):
        """Reap every zombie child; the run's own child is recorded in ``run``."""
        while True:
            try:
                pid, status, ru = os.wait4(-1, os.WNOHANG)
            except ChildProcessError:
                return
            if pid == 0:
                return
            if pid == run.pid:
                run.status_word, run.rusage = status, ru
            elif pid in self.leftovers:
                self.leftovers.discard(pid)
            else:
                run.orphans.append(ru)

    def signal_tree(self, run, sig):
        """Send ``sig`` to the run's process group and to every descendant it produced."""
        sent = 0
        if run.rusage is None:  # group id still pinned by our unreaped child
            try:
                os.killpg(run.pid, sig)
                sent += 1
            except (ProcessLookupError, PermissionError):
                pass
        for p in self.descendants():
            if p in self.leftovers:
                continue
            try:
                os.kill(p, sig)
                sent += 1
            except (ProcessLookupError, PermissionError):
                pass
        return sent

    def kill_tree(self, run, grace_s):
        """SIGTERM the tree, SIGKILL what survives ``grace_s``; reap the child."""
        self.signal_tree(run, signal.SIGTERM)
        end = time.monotonic() + grace_s
        while True:
            self.reap_orphans(run)
            alive = [p for p in self.descendants() if p not in self.leftovers]
            if run.rusage is not None and not alive:
                return
            if time.monotonic() >= end:
                break
            select.poll().poll(10)
        for _ in range(500):
            self.signal_tree(run, signal.SIGKILL)
            self.reap_orphans(run)
            alive = [p for p in self.descendants() if p not in self.leftovers]
            if run.rusage is not None and not alive:
                return
            select.poll().poll(5)
        if run.rusage is None:  # the child itself is gone from view; block for it
            _, run.status_word, run.rusage = os.wait4(run.pid, 0)

    # ---- one run

    def run(self, req):
        """Start, watch and measure one run; its ``done`` reply.

        Named steps: `prepare` (what to start and where), `arm` (everything the
        wait needs, made before the clock starts), `launch` (the spawn: the
        timed window opens), `watch` (output and the exit, or the timeout),
        `collect` (reaping, resource usage, what the run left behind) and
        `reply`. Between `launch` and the wait only the start time is read and
        the in-flight record stored: the child shares a CPU with the
        launcher then, so work there would lengthen its ``wall_s``.
        """
        run = Run(req)
        reply = self.prepare(run)
        if reply is not None:
            return reply
        slot = self.arm(run)
        err = self.launch(run, slot)
        if err is not None:
            return _result(run.started_at, run.extra, "failed", err, run.conditions)
        self.watch(run)
        self.collect(run)
        return self.reply(run)

    def prepare(self, run):
        """The run's program, arguments, environment and directory (with its
        start time, conditions and noise-control fields); a ``done`` reply
        saying why when it cannot start."""
        req = run.req
        g = req.get
        run.started_at = utc_now_iso()
        cpus = g("cpus")
        run.conditions = self.conditions(cpus) if g("sample") else None
        extra = run.extra
        if cpus:
            extra["cpus"] = ",".join(map(str, cpus))
        if g("nice") is not None:
            extra["nice"] = g("nice")
        if g("no_aslr"):
            extra["aslr"] = "off"
            if not self.aslr_control:
                return run.failed("cannot turn off address-space randomization here: "
                                  f"personality() refused ({self.aslr_reason})")
        shell = g("shell_command")
        argv = run.argv = ["/bin/sh", "-c", shell] if shell is not None else req["argv"]
        if "env" in req:  # absent: the same environment as the previous run
            self.env = req["env"] or {}
        env = run.env = self.env
        cwd = g("cwd") or self.cwd0
        try:
            os.chdir(cwd)  # every run: the folder may have been replaced since
        except OSError as e:
            return run.failed(f"cannot change to working directory {cwd!r}: {e.strerror}")
        run.cwd = cwd
        key = run.key = (argv[0], env.get("PATH"), cwd)
        path = self.resolved.get(key)
        if path is None:  # a path found before is used again (see `launch`)
            path, err = _resolve(argv[0], env, cwd)
            if err:
                return run.failed(err)
            self.resolved[key] = path
        run.path = path
        return None

    def arm(self, run):
        """Made before the spawn: the peak-RSS mark reset, the output pipes
        (kept between runs, see `settle`) and their tails, the last run's fds
        closed; returns the in-flight slot (or None)."""
        if self.clear_refs is not None:
            try:
                os.write(self.clear_refs, b"5")
            except OSError:
                pass
        out_r, _out_w, err_r, _err_w = self._pipes()
        cap = run.cap = int(run.req.get("capture_bytes", 65536))
        if cap > self.tail_size:
            self.tail_size = cap
            self.out_tail, self.err_tail = Tail(cap), Tail(cap)
        run.tails = {out_r: self.out_tail, err_r: self.err_tail}
        run.linger_ns = int(float(run.req.get("linger_s", 0.1)) * 1e9)
        run.open_pipes = {out_r, err_r}
        inflight = run.req.get("inflight")
        slot = self.inflight_slot(inflight) if inflight else None
        if self.to_close:
            self.close_run_fds()  # the last run's (nothing reads them any more)
        return slot

    def launch(self, run, slot):
        """Spawn the child (the timed window opens), set up its pidfd (only
        where there is no signalfd, see `_make_sigfd`) and
        store the in-flight record; the error message when it could not
        start, else None.

        Everything that can be worked out before the spawn is (the time
        limit, whether to notify, the spawn's kind): from the spawn to the
        wait the launcher runs on cold caches while the child waits for the
        CPU, so each step there lengthens the run's ``wall_s`` (measured in
        place with ``perf_counter_ns`` stamps over 2,000 queued runs of
        ``/bin/true``: about 12 us from the spawn's return to the ``poll``
        before these changes, of which 4 us the in-flight store).
        """
        g = run.req.get
        timeout_s = g("timeout_s")
        if timeout_s is not None:
            run.timer = self.arm_timer(timeout_s)
            timeout_ns = int(timeout_s * 1e9)
        notify = g("notify", True)
        plain = not g("cpus") and g("nice") is None and not g("no_aslr")
        clock, tick = time.clock_gettime_ns, self.tick_ns
        # The boot clock before and after the spawn bound the child's start time.
        start_lo = clock(CLOCK_BOOTTIME) // tick
        if plain:  # `spawn` inlined: a call and a tuple less inside the window
            t0 = time.perf_counter_ns()
            try:
                pid = os.posix_spawn(run.path, run.argv, run.env, setpgroup=0,
                                     setsigdef=SPAWN_SIGDEF, setsigmask=self.sigmask0)
            except (OSError, ValueError, TypeError) as e:
                pid, err = None, _spawn_error(run.argv, e)
        else:
            pid, t0, err = self.spawn(run.path, run.argv, run.env, g("cpus"), g("nice"),
                                      g("no_aslr"))
        if pid is None and self.resolved.pop(run.key, None) is not None:
            # The program found for an earlier run is gone or changed: look again.
            path, err = _resolve(run.argv[0], run.env, run.cwd)
            if err is None:
                self.resolved[run.key] = path
                pid, t0, err = self.spawn(path, run.argv, run.env, g("cpus"), g("nice"),
                                          g("no_aslr"))
        if pid is None:
            if run.timer:
                self.disarm_timer(run)
            return err
        if self.sigfd is None:  # no signalfd here: a pidfd per run
            pidfd = run.pidfd = os.pidfd_open(pid)
            self.pipe_poller.register(pidfd, select.POLLIN)
        start_hi = clock(CLOCK_BOOTTIME) // tick
        run.pid, run.t0 = pid, t0
        if slot is not None:
            # The in-flight record (for a later resume that finds the run still
            # going): one format and one copy into the shared mapping. Measured
            # (experiments/bench/launcher_window.py): about 1% of the ``wall_s``
            # of ``/bin/true``; waiting on a 1 ms timer to make it only for
            # longer runs cost 4.4%, since a ``poll`` with a near timeout sees
            # the child's exit later than one without. (A launcher killed
            # between the spawn and this store leaves the last run's record:
            # that run is over, and resume signals nothing that is not still
            # the recorded process.)
            entry, run_id = slot
            rec = entry[1] % (run_id, pid, pid, start_lo, start_hi)
            n = len(rec)
            if n == entry[3]:
                entry[0][:n] = rec   # the rest already holds spaces (the last store padded it)
            else:
                entry[0][:] = rec.ljust(INFLIGHT_SIZE)
                entry[3] = n
        run.start = (start_lo, start_hi)
        if notify:
            send(self.wfd, {"op": "started", "pid": pid, "pgid": pid,
                            "start": (start_lo, start_hi)})
        if timeout_s is not None:
            run.deadline = t0 + timeout_ns
        return None

    def watch(self, run):
        """Wait on the exit signal (signalfd or pidfd), the output pipes, the
        request pipe and the time limit's timer until the
        child exits (the timed window closes) or its time is up; then read
        the pipes until end of file while a leftover process may still hold
        them, for at most ``linger_s``."""
        poller = self.pipe_poller
        linger_ns = run.linger_ns
        pidfd, sigfd = run.pidfd, self.sigfd
        while True:
            now = time.perf_counter_ns()
            if run.t1 is None:
                wait_ns = None if run.deadline is None else run.deadline - now
                if wait_ns is not None and wait_ns <= 0:
                    self.stop_tree(run, linger_ns, timed_out=True)
                    continue
                if run.timer:
                    wait_ns = None  # the timer wakes us (see `arm_timer`)
            else:
                if not run.open_pipes or now >= run.linger_end:
                    break
                wait_ns = run.linger_end - now
            events = poller.poll(None if wait_ns is None else max(1, -(-wait_ns // 1_000_000)))
            if run.t1 is None:
                woke = time.perf_counter_ns()
                for fd, _ev in events:
                    if fd == sigfd:
                        how = self.child_exited(run.pid)
                        if not how:
                            continue
                        # merged into an earlier signal: the exit came after we woke
                        run.t1 = woke if how == 1 else time.perf_counter_ns()
                    elif fd == pidfd:
                        run.t1 = woke
                        poller.unregister(pidfd)
                    else:
                        continue
                    if run.timer:
                        self.disarm_timer(run)
                    self.settle(run)
                    run.linger_end = run.t1 + linger_ns
                    break
            self.on_events(run, events, linger_ns)
        if run.open_pipes:
            self.release()  # lingered until the time ran out: give these pipes up
        if run.aborted is not None and self.pipes is not None:
            poller.register(self.rfd, select.POLLIN)  # the kept poller watches it again

    def on_events(self, run, events, linger_ns):
        """Output to read (until each pipe is empty, or its end), or a message
        on the request pipe while the run goes on."""
        for fd, _ev in events:
            if fd in run.open_pipes:
                if not run.tails[fd].fill(fd):  # end of file
                    self.pipe_poller.unregister(fd)
                    run.open_pipes.discard(fd)
            elif fd == self.rfd and run.aborted is None:
                self.interrupted(run, linger_ns)
            elif fd == self.timer_fd:
                try:
                    os.read(fd, 8)  # the time limit is near: the loop checks it
                except OSError:
                    pass
                run.timer = False

    def arm_timer(self, timeout_s):
        """Arm the timerfd to go off ``timeout_s`` from now; False where there is none.

        Made before the spawn, so the wait after it can block with no timeout:
        measured (experiments/bench/launcher_window.py), a ``poll`` with a far
        but finite timeout saw ``/bin/true``'s exit later (its ``wall_s``
        x1.011 the bare runs') than one without. The timer goes off a few
        microseconds before the deadline (it starts before the clock does);
        the wait then finishes with an ordinary timeout.
        """
        fd = self.timer_fd
        if fd is None:
            fd = self.timer_fd = self._make_timer()
            if fd and self.pipe_poller is not None:
                self.pipe_poller.register(fd, select.POLLIN)
        if not fd:
            return False
        spec = self.timer_spec
        sec = int(timeout_s)
        ns = int((timeout_s - sec) * 1e9)
        if sec == 0 and ns == 0:
            ns = 1  # zero would disarm it
        spec[2], spec[3] = sec, ns
        return self.timer_settime(fd, 0, spec, None) == 0

    def disarm_timer(self, run):
        spec = self.timer_spec
        spec[2] = spec[3] = 0
        self.timer_settime(self.timer_fd, 0, spec, None)
        run.timer = False

    def _make_timer(self):
        """A non-blocking, close-on-exec ``timerfd`` on the monotonic clock
        (through the C library: no ``os.timerfd_create`` before Python 3.13),
        or False."""
        libc, ct = self.libc, self.ctypes
        try:
            fd = libc.timerfd_create(time.CLOCK_MONOTONIC, os.O_NONBLOCK | os.O_CLOEXEC)
            if fd < 0:
                return False
            self.timer_spec = (ct.c_long * 4)()  # struct itimerspec: interval, value
            settime = libc.timerfd_settime
            settime.argtypes = (ct.c_int, ct.c_int, ct.c_void_p, ct.c_void_p)
            self.timer_settime = settime
            return fd
        except (AttributeError, OSError, TypeError):
            return False

    def interrupted(self, run, linger_ns):
        """A message on the request pipe during a run: the harness went away
        (stop after this run) or asked for something (handled after it); the
        run's tree is killed either way."""
        msg = None
        try:
            msg = self.reader.read()
        except Exception:  # noqa: BLE001
            msg = None
        if msg is None:
            self.stop = True
        else:
            self.pending_msg = msg  # handled once this run is over
        run.aborted = ("interrupted: the harness went away" if msg is None
                       else "interrupted by the harness")
        self.pipe_poller.unregister(self.rfd)
        if run.t1 is None:
            self.stop_tree(run, linger_ns)

    def stop_tree(self, run, linger_ns, timed_out=False):
        """Kill the run's whole tree; the timed window closes at the reap."""
        run.timed_out = timed_out
        if run.timer:
            self.disarm_timer(run)
        self.kill_tree(run, float(run.req.get("kill_grace_s", 0.5)))
        run.t1 = time.perf_counter_ns()
        self.release()
        if run.pidfd is not None:
            self.pipe_poller.unregister(run.pidfd)
        self.drain_signals()  # the killed tree's
        run.linger_end = run.t1 + linger_ns

    def release(self):
        """Give the output pipes up: our write ends are closed now (while the
        child lives we hold them, so its pipes never reach end of file early
        and its exit costs one wake-up, its SIGCHLD), the read ends after the
        reply; the next run gets new pipes."""
        if self.pipes is not None:
            out_r, out_w, err_r, err_w = self.pipes
            self.pipes = None
            os.close(out_w)
            os.close(err_w)
            os.dup2(self.devnull, 1)  # our copies at 1 and 2 (see `_pipes`) too
            os.dup2(self.devnull, 2)
            self.to_close.extend((out_r, err_r))

    def settle(self, run):
        """The child has exited: reap it; keep the pipes if nobody else can hold them.

        The child has written all it will: one ``poll`` without waiting tells
        which pipes hold data (usually none), and only those are read.
        """
        _, run.status_word, run.rusage = os.wait4(run.pid, 0)
        kids = run.kids = self.own_children()
        if kids is None or not kids <= self.leftovers:
            self.release()
            return
        for fd, _ev in self.pipe_poller.poll(0):
            tail = run.tails.get(fd)
            if tail is not None:
                tail.fill(fd)
            elif fd == self.sigfd:
                self.drain_signals()  # another child's, noted meanwhile
        run.open_pipes.clear()

    def collect(self, run):
        """Reap the child if the wait did not, and find what the run left behind."""
        if run.rusage is None:
            _, run.status_word, run.rusage = os.wait4(run.pid, 0)
        # A pidfd (and pipes given up) are closed before the next spawn:
        # nothing reads them any more.
        if run.pidfd is not None:
            self.to_close.append(run.pidfd)
        # Our own children list is cheap to read; anything the run left
        # behind has an ancestor in it (orphans are re-parented to us), so the
        # full walk and the reaping only happen when it shows something new.
        kids = run.kids if run.kids is not None else self.own_children()
        if kids is None or kids:
            self.reap_orphans(run)  # also reaps leftovers of earlier runs that died
            self.drain_signals()
            if kids is None or not kids <= self.leftovers:
                left = [p for p in self.descendants() if p not in self.leftovers]
                if left:
                    self.leftovers.update(left)
                    run.extra["leftover_processes"] = len(left)

    def reply(self, run):
        """The ``done`` reply: status, exit code, time, usage, output tails, message."""
        ru = run.rusage
        usage = (ru.ru_utime, ru.ru_stime, ru.ru_maxrss, ru.ru_minflt, ru.ru_majflt,
                 ru.ru_nvcsw, ru.ru_nivcsw, ru.ru_inblock, ru.ru_oublock)
        if run.orphans:
            usage = _with_orphans(usage, run.orphans)
            run.extra["orphans_counted"] = len(run.orphans)
        stdout, stderr = self.out_tail.take(run.cap), self.err_tail.take(run.cap)
        status_word = run.status_word
        if os.WIFSIGNALED(status_word):
            exit_code = -os.WTERMSIG(status_word)
        else:
            exit_code = os.waitstatus_to_exitcode(status_word)
        if run.aborted:
            status, message = "failed", run.aborted
        elif run.timed_out:
            status = "timeout"
            message = (f"timed out after {run.req.get('timeout_s'):g} s; "
                       "the run's process tree was killed")
        elif exit_code == 0:
            status, message = "ok", ""
        else:
            status = "failed"
            why = f"killed by {_signame(-exit_code)}" if exit_code < 0 else \
                f"exit code {exit_code}"
            tail = _tail_text(stderr)
            message = why + (f": {tail}" if tail else " (nothing on stderr)")
        return {"op": "done", "started_at": run.started_at, "status": status,
                "exit_code": exit_code, "wall_ns": run.t1 - run.t0, "rusage": usage,
                "stdout": stdout, "stderr": stderr, "extra": run.extra, "message": message,
                "conditions": run.conditions}

    def spawn(self, path, argv, env, cpus, nice, no_aslr):
        """Start the child on the output pipes; returns (pid, t0_ns, error message or None)."""
        if not cpus and nice is None and not no_aslr:
            t0 = time.perf_counter_ns()
            try:
                pid = os.posix_spawn(path, argv, env, setpgroup=0, setsigdef=SPAWN_SIGDEF,
                                     setsigmask=self.sigmask0)
            except (OSError, ValueError, TypeError) as e:
                return None, t0, _spawn_error(argv, e)
            return pid, t0, None
        return self.fork_exec(path, argv, env, cpus, nice, no_aslr)

    def fork_exec(self, path, argv, env, cpus, nice, no_aslr):
        """fork+exec: the child sets itself up, writes its clock reading right
        before execve (so the fork of this Python process is not timed), and
        reports a failed step through the close-on-exec pipe."""
        ep_r, ep_w = os.pipe()
        pid = os.fork()
        if pid == 0:  # child
            self.child_setup(ep_w, path, argv, env, cpus, nice, no_aslr)  # never returns
        os.close(ep_w)
        try:
            os.setpgid(pid, pid)
        except OSError:
            pass
        data = b""
        while True:
            chunk = os.read(ep_r, 4096)
            if not chunk:
                break
            data += chunk
        os.close(ep_r)
        t0 = time.perf_counter_ns()
        err = None
        if len(data) >= 9 and data[:1] == b"T":
            t0 = int.from_bytes(data[1:9], "big")
            if data[9:10] == b"E":
                err = data[10:].decode("utf-8", "replace")
        elif data[:1] == b"E":
            err = data[1:].decode("utf-8", "replace")
        else:
            err = "the child died while being set up"
        if err is not None:
            os.waitpid(pid, 0)
            self.drain_signals()  # its SIGCHLD must not wake the next run's wait
            return None, t0, err
        return pid, t0, None

    def child_setup(self, ep_w, path, argv, env, cpus, nice, no_aslr):
        """In the forked child: process group, signals, CPUs, niceness, ASLR,
        the standard streams, then ``execve``; a failed step is written to
        ``ep_w`` and the child exits 127."""
        step = "set up the process group"
        try:
            os.setpgid(0, 0)
            for s in SPAWN_SIGDEF:
                signal.signal(s, signal.SIG_DFL)
            signal.pthread_sigmask(signal.SIG_SETMASK, self.sigmask0)
            if cpus:
                step = f"pin to CPUs {','.join(map(str, cpus))}"
                os.sched_setaffinity(0, cpus)
            if nice is not None:
                step = f"set niceness {nice}"
                os.setpriority(os.PRIO_PROCESS, 0, nice)
            if no_aslr:
                step = "turn off address-space randomization"
                cur = self.libc.personality(PERSONALITY_QUERY)
                if cur == -1 or self.libc.personality(cur | ADDR_NO_RANDOMIZE) == -1:
                    raise OSError(self.ctypes.get_errno(), os.strerror(self.ctypes.get_errno()))
            os.dup2(self.devnull, 0)
            os.dup2(self.pipes[1], 1)
            os.dup2(self.pipes[3], 2)
            step = f"start {argv[0]!r}"
            os.write(ep_w, b"T" + time.perf_counter_ns().to_bytes(8, "big"))
            os.execve(path, argv, env)
        except BaseException as e:  # noqa: BLE001 - report anything, then die
            try:
                reason = getattr(e, "strerror", None) or str(e) or type(e).__name__
                os.write(ep_w, b"E" + f"cannot {step}: {reason}".encode("utf-8", "replace"))
            finally:
                os._exit(127)

    def _pipes(self):
        """The output pipes (kept between runs, see `settle`), widened so a
        loud command blocks less often and wakes the launcher less often, and
        the poll object watching them and the request pipe.

        Their write ends are also our own stdout and stderr (fds 1 and 2), so
        a child inherits them as they are: the spawn needs no file actions
        (each ``dup2`` in the child lies inside the timed window; measured:
        three of them lengthened ``/bin/true`` by about 1%).
        """
        if self.pipes is None:
            out_r, out_w = os.pipe()
            err_r, err_w = os.pipe()
            os.set_blocking(out_r, False)
            os.set_blocking(err_r, False)
            widen_pipe(out_r, OUTPUT_PIPE_SIZE)
            widen_pipe(err_r, OUTPUT_PIPE_SIZE)
            os.dup2(out_w, 1)
            os.dup2(err_w, 2)
            self.pipes = (out_r, out_w, err_r, err_w)
            poller = select.poll()
            for fd in (out_r, err_r, self.rfd):
                poller.register(fd, select.POLLIN)
            if self.timer_fd:
                poller.register(self.timer_fd, select.POLLIN)
            if self.sigfd is not None:
                poller.register(self.sigfd, select.POLLIN)
            self.pipe_poller = poller
        return self.pipes

    def serve(self):
        send(self.wfd, self.hello())
        while not self.stop:
            if self.pending_msg is not None:
                req, self.pending_msg = self.pending_msg, None
            elif self.qpos < len(self.queue) and not self.held:
                # Between queued runs: a quick look at both pipes, no blocking.
                if self.reader.has_frame() or self.idle.poll(0):
                    if not self.take_input():
                        break
                    continue
                req = self.queue[self.qpos]
                self.queue[self.qpos] = None
                self.qpos += 1
                if self.qpos > 4096:
                    del self.queue[:self.qpos]
                    self.qpos = 0
                try:
                    self.run_queued(req)  # its fds are closed while the next run executes
                except OSError:
                    break  # the harness is gone
                continue
            else:
                if not self.reader.has_frame():
                    # about to wait: hand over what finished, release the last run's fds
                    try:
                        self.flush_done()
                    except OSError:
                        break
                    self.close_run_fds()
                    now = time.monotonic()
                    if now - self.collected_at >= 1.0:  # at most once a second
                        gc.collect()
                        self.collected_at = now
                    if not self.take_input(block=True):
                        break
                    continue
                try:
                    req = self.reader.read()
                except OSError:
                    req = None
            if req is None or not self.handle(req):
                break
        for m in self.inflight_maps.values():
            m[0].close()

    def take_input(self, block=False):
        """Read what the pipes hold: queued batches, or one request-pipe message.

        False when the harness is gone or asked the launcher to exit.
        """
        while self.qreader is not None and self.qreader.has_frame():
            self.enqueue(self.qreader.read())
        if self.reader.has_frame():
            return self.handle(self.reader.read())
        for fd, _ev in self.idle.poll(None if block else 0):
            if fd == self.qfd:
                try:
                    batch = self.qreader.read()
                except OSError:
                    batch = None
                if batch is None:  # queue pipe closed: the harness is gone
                    return False
                self.enqueue(batch)
                while self.qreader.has_frame():
                    self.enqueue(self.qreader.read())
            elif fd == self.rfd:
                try:
                    msg = self.reader.read()
                except OSError:
                    msg = None
                if msg is None or not self.handle(msg):
                    return False
        return True

    def enqueue(self, batch):
        """A batch of queued runs (with the journal and line format when they change)."""
        if "journal" in batch and batch["journal"] != self.journal_path:
            if self.journal_fd is not None:
                os.close(self.journal_fd)
                self.journal_fd = None
            self.journal_path = batch["journal"]
            if self.journal_path:
                self.journal_fd = os.open(self.journal_path,
                                          os.O_WRONLY | os.O_APPEND | os.O_CLOEXEC)
        if "format" in batch:
            self.line_format = batch["format"]
            # A run with no extra fields of its own: its conditions, then the
            # fields the harness adds to every run (rendered once here).
            self.tail_fields = batch.get("fields")
            tail = []
            for k, v in (self.tail_fields or {}).items():
                text = _json_value(v)
                if text is None or _json_value(k) is None or k in ("load_1m", "cpu_mhz"):
                    tail = None
                    break
                tail.append(',"%s":%s' % (k, text))
            self.line_tail = None if tail is None else "".join(tail)
            self.fast_format = (None if tail is None else self.line_format
                                + ',"load_1m":%s,"cpu_mhz":%s'
                                + self.line_tail.replace("%", "%%") + "}\n")
        if "freq_files" in batch:
            self.freq_files = batch["freq_files"]
        self.queue.extend(batch["runs"])

    def handle(self, req):
        """One request-pipe message; False when the launcher should exit."""
        op = req.get("op")
        if op == "exit":
            return False
        if op == "run":
            try:
                reply = self.run(req)
            except Exception as e:  # noqa: BLE001 - one bad request must not end the session
                reply = self.crash_reply(e)
        elif op == "ping":
            reply = {"op": "pong", "leftovers": sorted(self.leftovers)}
        elif op == "resume":
            self.held = False
            return True
        elif op == "drop":
            # The harness stops the queue: nothing queued runs any more.
            self.queue, self.qpos, self.held = [], 0, False
            reply = {"op": "dropped"}
        else:
            return True  # a stray abort between runs: nothing to do
        if self.stop:
            return False
        try:
            send(self.wfd, reply)
        except OSError:
            return False
        finally:
            self.close_run_fds()
        return True

    @staticmethod
    def crash_reply(e):
        return {"op": "done", "status": "failed", "exit_code": None, "wall_ns": None,
                "rusage": None, "stdout": b"", "stderr": b"", "extra": {},
                "started_at": utc_now_iso(),
                "message": f"the launcher could not run this: {type(e).__name__}: {e}"}

    def run_queued(self, req):
        """Run one queued request; write its journal line when it ended ok."""
        try:
            reply = self.run(req)
        except Exception as e:  # noqa: BLE001
            reply = self.crash_reply(e)
        reply["key"] = req.get("key")
        if reply["status"] == "ok" and not self.stop and self.pending_msg is None:
            line = self.journal_line(req, reply)
            if line is not None and self.write_line(line):
                # The harness hears of journalled runs in batches: one reply
                # write per batch rather than per run (see `flush_done`).
                done = self.done
                done.append((reply["key"], reply["wall_ns"], reply["rusage"], reply["extra"],
                             reply.get("conditions"), reply["started_at"]))
                now = time.perf_counter_ns()
                if len(done) >= DONE_BATCH or now - self.done_since >= DONE_EVERY_NS:
                    self.flush_done(now)
                return
        # Anything else is recorded by the harness; the queue waits for it.
        reply["written"] = False
        self.held = True
        self.flush_done()
        send(self.wfd, reply)

    def write_line(self, line):
        """Append a journal line with one ``write``; False if it could not be
        written (a full disk): the part already written is cut off again, so the
        journal holds whole lines only, and the run goes to the harness to record
        (which then meets the full disk itself and says so)."""
        n = 0
        try:
            n = os.write(self.journal_fd, line)
            while n < len(line):  # only on short writes (full disk, signals)
                n += os.write(self.journal_fd, line[n:])
            return True
        except OSError:
            if n:
                try:
                    os.ftruncate(self.journal_fd, os.fstat(self.journal_fd).st_size - n)
                except OSError:
                    pass
            return False

    def flush_done(self, now=None):
        """Send the batch of journalled runs not yet reported (``dones``)."""
        if self.done:
            send(self.wfd, {"op": "dones", "items": self.done})
            self.done = []
        self.done_since = time.perf_counter_ns() if now is None else now

    def journal_line(self, req, reply):
        """The run's journal line (bytes), or None if the harness must write it.

        ``head`` (from the harness) is the record's opening up to its status;
        ``line_format`` renders exit code, the usage figures and the start time;
        then come this run's extra fields, its conditions and the fields the
        harness adds to every such run, in the order the harness's own records
        have them.
        """
        head = req.get("head")
        if head is None or self.journal_fd is None or self.line_format is None:
            return None
        cond = reply.get("conditions")
        last = self.last_conditions
        if not reply["extra"] and last is not None and cond is last[2] \
                and self.line_tail is not None and req.get("fields") == self.tail_fields:
            # The usual run: nothing of its own to add, so one format does it all.
            return (head + self.fast_format % (
                reply["exit_code"], reply["wall_ns"] / 1e9, *reply["rusage"],
                reply["started_at"], *last[3])).encode()
        parts = [head, self.line_format % (reply["exit_code"], reply["wall_ns"] / 1e9,
                                           *reply["rusage"], reply["started_at"])]
        fields = dict(reply["extra"])
        for k, v in (reply.get("conditions") or {}).items():
            fields.setdefault(k, v)
        fields.update(req.get("fields") or {})
        for k, v in fields.items():
            text = _json_value(v)
            if text is None or _json_value(k) is None:
                return None
            parts.append(',"%s":%s' % (k, text))
        parts.append("}\n")
        return "".join(parts).encode()

    def close_run_fds(self):
        while self.to_close:
            try:
                os.close(self.to_close.pop())
            except OSError:
                pass


#: How the harness starts the launcher: ``python -I -S -B -c BOOTSTRAP PATH FDS...``.
#: Compiling this module takes about 3 MiB that the interpreter keeps (the
#: parser's memory is interleaved with what lives on, so neither the garbage
#: collector nor ``malloc_trim`` gives it back), and the launcher's resident
#: size is every run's memory floor. So a forked child compiles it and sends
#: the code object back marshalled; the launcher only loads it (measured: 12.6
#: MiB compiled in place, 9.4 MiB loaded). Where the fork or the compile
#: fails, it is compiled here after all.
BOOTSTRAP = """\
import marshal, os, sys
path = sys.argv[1]
sys.argv = sys.argv[1:]
code = None
try:
    r, w = os.pipe()
    pid = os.fork()
    if pid == 0:
        try:
            os.close(r)
            with open(path, "rb") as f:
                view = memoryview(marshal.dumps(compile(f.read(), path, "exec")))
            while view:
                view = view[os.write(w, view):]
        finally:
            os._exit(0)
    os.close(w)
    parts = []
    while True:
        b = os.read(r, 1 << 16)
        if not b:
            break
        parts.append(b)
    os.close(r)
    os.waitpid(pid, 0)
    code = marshal.loads(b"".join(parts))
    del parts
except Exception:
    code = None
if code is None:
    with open(path, "rb") as f:
        code = compile(f.read(), path, "exec")
exec(code, {"__name__": "__main__", "__file__": path, "__builtins__": __builtins__})
"""


def main(argv=None):
    argv = sys.argv[1:] if argv is None else argv
    rfd, wfd = int(argv[0]), int(argv[1])
    qfd = int(argv[2]) if len(argv) > 2 else None
    # The launcher makes no reference cycles on its way through a run, so the
    # cyclic collector only costs time there (and most when thousands of queued
    # requests are held); it runs when the launcher is about to wait, at most
    # once a second.
    gc.disable()
    try:
        Launcher(rfd, wfd, qfd).serve()
    except BrokenPipeError:
        # The harness closed its end before the first exchange (it stopped at a
        # mistake found while the launcher started): nothing ran, nothing to say.
        os._exit(0)
    # Nothing is buffered and nothing needs cleaning up: skip the interpreter's
    # teardown, which the harness would otherwise wait for at the end of a run.
    os._exit(0)


if __name__ == "__main__":
    sys.exit(main())
