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
  moment the child's pidfd reports its exit (a blocking ``poll``, not a polling
  loop), then reaps it with ``os.wait4`` for its resource usage;
* on timeout kills the run's whole tree: its process group and every descendant
  that left it (``setsid``); the launcher is a child subreaper
  (``prctl(PR_SET_CHILD_SUBREAPER)``) so such escapees stay below it and are
  found through ``/proc/<pid>/task/<tid>/children``. SIGTERM first, SIGKILL after
  a short grace;
* reaps orphans that were re-parented to it and adds their resource usage to
  the run that produced them.

If the harness goes away (its end of the request pipe closes) during a run, the
launcher kills that run's tree and exits.
"""

import marshal
import os
import select
import sys

import _signal as signal  # the C module: `signal` would pull in enum and functools
import time

HEADER_SIZE = 4
PR_SET_CHILD_SUBREAPER = 36
ADDR_NO_RANDOMIZE = 0x0040000
PERSONALITY_QUERY = 0xFFFFFFFF
READ_CHUNK = 1 << 16


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


def _is_zombie(pid):
    try:
        with open(f"/proc/{pid}/stat", "rb") as f:
            stat = f.read()
    except OSError:
        return True
    # state follows the parenthesised command name, which may contain ") ".
    return stat[stat.rfind(b")") + 2:stat.rfind(b")") + 3] in (b"Z", b"X")


class Launcher:
    def __init__(self, rfd, wfd):
        self.rfd = rfd
        self.reader = FrameReader(rfd)
        self.wfd = wfd
        os.set_inheritable(rfd, False)
        os.set_inheritable(wfd, False)
        self.pid = os.getpid()
        self.cwd0 = os.getcwd()
        self.devnull = os.open(os.devnull, os.O_RDWR | os.O_CLOEXEC)
        self.libc, self.ctypes = _libc()
        self.subreaper = False
        if self.libc is not None:
            self.subreaper = self.libc.prctl(PR_SET_CHILD_SUBREAPER, 1, 0, 0, 0) == 0
        self.aslr_control, self.aslr_reason = self._probe_personality()
        # Writing "5" to clear_refs resets the peak-RSS mark of our address
        # space, so children spawned from it start from our current size only.
        try:
            self.clear_refs = os.open("/proc/self/clear_refs", os.O_WRONLY | os.O_CLOEXEC)
        except OSError:
            self.clear_refs = None
        self.children_path = f"/proc/{self.pid}/task/{self.pid}/children"
        self.children_fd = None
        self.inflight_fds = {}  # in-flight record path -> open fd
        self.env = {}
        self.resolved = {}  # (command, PATH, cwd) -> executable path
        self.leftovers = set()   # live descendants that earlier runs left behind
        self.to_close = []       # fds of the last run, closed after its reply
        self.stop = False

    # ---- capabilities

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

    def record_inflight(self, inflight, pid):
        """Write the running child into the harness's in-flight file (for resume)."""
        path, run_id, boot = inflight
        fds = self.inflight_fds
        try:
            fd = fds.get(path)
            if fd is None:
                fd = fds[path] = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_CLOEXEC, 0o644)
            text = '{"run": %d, "pid": %d, "pgid": %d, "boot": "%s"}' % (run_id, pid, pid,
                                                                         boot)
            os.pwrite(fd, text.encode().ljust(160), 0)
        except OSError:
            pass  # the record helps a later resume; the run itself goes on

    def hello(self):
        try:
            os.close(os.pidfd_open(self.pid))
            pidfd = ""
        except (AttributeError, OSError) as e:
            pidfd = str(e) or type(e).__name__
        return {"op": "hello", "pid": self.pid, "subreaper": self.subreaper, "pidfd_error": pidfd,
                "aslr_control": self.aslr_control, "aslr_reason": self.aslr_reason,
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
            if pid == run.get("pid"):
                run["status_word"] = status
                run["rusage"] = ru
            elif pid in self.leftovers:
                self.leftovers.discard(pid)
            else:
                run["orphans"].append(ru)

    def signal_tree(self, run, sig):
        """Send ``sig`` to the run's process group and to every descendant it produced."""
        sent = 0
        if "rusage" not in run:  # group id still pinned by our unreaped child
            try:
                os.killpg(run["pid"], sig)
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
            if "rusage" in run and not alive:
                return
            if time.monotonic() >= end:
                break
            select.poll().poll(10)
        for _ in range(500):
            self.signal_tree(run, signal.SIGKILL)
            self.reap_orphans(run)
            alive = [p for p in self.descendants() if p not in self.leftovers]
            if "rusage" in run and not alive:
                return
            select.poll().poll(5)
        if "rusage" not in run:  # the child itself is gone from view; block for it
            pid, status, ru = os.wait4(run["pid"], 0)
            run["status_word"], run["rusage"] = status, ru

    # ---- one run

    def spawn(self, req, path, argv, env, out_w, err_w):
        """Start the child; returns (pid, t0_ns, error message or None)."""
        cpus = req.get("cpus")
        nice = req.get("nice")
        no_aslr = req.get("no_aslr")
        if not cpus and nice is None and not no_aslr:
            t0 = time.perf_counter_ns()
            try:
                pid = os.posix_spawn(
                    path, argv, env,
                    file_actions=[(os.POSIX_SPAWN_DUP2, self.devnull, 0),
                                  (os.POSIX_SPAWN_DUP2, out_w, 1),
                                  (os.POSIX_SPAWN_DUP2, err_w, 2)],
                    setpgroup=0, setsigdef=(signal.SIGPIPE, signal.SIGXFSZ))
            except OSError as e:
                return None, t0, f"cannot start {argv[0]!r}: {e.strerror or e}"
            except (ValueError, TypeError) as e:  # e.g. a NUL byte in an argument
                return None, t0, f"cannot start {argv[0]!r}: {e}"
            return pid, t0, None
        # fork+exec: the child sets itself up, writes its clock reading right
        # before execve (so the fork of this Python process is not timed),
        # and reports a failed step through the close-on-exec pipe.
        ep_r, ep_w = os.pipe()
        pid = os.fork()
        if pid == 0:  # child
            step = "set up the process group"
            try:
                os.setpgid(0, 0)
                for s in (signal.SIGPIPE, signal.SIGXFSZ):
                    signal.signal(s, signal.SIG_DFL)
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
                os.dup2(out_w, 1)
                os.dup2(err_w, 2)
                step = f"start {argv[0]!r}"
                os.write(ep_w, b"T" + time.perf_counter_ns().to_bytes(8, "big"))
                os.execve(path, argv, env)
            except BaseException as e:  # noqa: BLE001 - report anything, then die
                try:
                    reason = getattr(e, "strerror", None) or str(e) or type(e).__name__
                    os.write(ep_w, b"E" + f"cannot {step}: {reason}".encode("utf-8", "replace"))
                finally:
                    os._exit(127)
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
            return None, t0, err
        return pid, t0, None

    def run(self, req):
        started_at = utc_now_iso()
        extra = {}
        if req.get("cpus"):
            extra["cpus"] = ",".join(map(str, req["cpus"]))
        if req.get("nice") is not None:
            extra["nice"] = req["nice"]
        if req.get("no_aslr"):
            extra["aslr"] = "off"
        base = {"op": "done", "started_at": started_at, "exit_code": None,
                "wall_ns": None, "rusage": None, "stdout": b"", "stderr": b"", "extra": extra}
        if req.get("no_aslr") and not self.aslr_control:
            return dict(base, status="failed", message="cannot turn off address-space "
                        f"randomization here: personality() refused ({self.aslr_reason})")
        if req.get("shell_command") is not None:
            argv = ["/bin/sh", "-c", req["shell_command"]]
        else:
            argv = list(req["argv"])
        if "env" in req:  # absent: the same environment as the previous run
            self.env = req["env"] or {}
        env = self.env
        cwd = req.get("cwd") or self.cwd0
        try:
            os.chdir(cwd)  # every run: the folder may have been replaced since
        except OSError as e:
            return dict(base, status="failed",
                        message=f"cannot change to working directory {cwd!r}: {e.strerror}")
        key = (argv[0], env.get("PATH"), cwd)
        path = self.resolved.get(key)
        if path is None or not os.access(path, os.X_OK):  # one check when seen before
            path, err = _resolve(argv[0], env, cwd)
            if err:
                self.resolved.pop(key, None)
                return dict(base, status="failed", message=err)
            self.resolved[key] = path
        cap = int(req.get("capture_bytes", 65536))
        timeout_s = req.get("timeout_s")
        grace_s = float(req.get("kill_grace_s", 0.5))
        linger_s = float(req.get("linger_s", 0.1))
        if self.clear_refs is not None:
            try:
                os.write(self.clear_refs, b"5")
            except OSError:
                pass

        out_r, out_w = os.pipe()
        err_r, err_w = os.pipe()
        # Everything the wait needs is made before the spawn, so that only the
        # pidfd is set up between the two clock readings.
        run = {"pid": None, "orphans": []}
        bufs = {out_r: bytearray(), err_r: bytearray()}
        poller = select.poll()
        for fd in (out_r, err_r, self.rfd):
            poller.register(fd, select.POLLIN)
        open_pipes = {out_r, err_r}
        t1 = None
        timed_out = False
        aborted = None
        linger_end = None

        def drain(fd):
            try:
                data = os.read(fd, READ_CHUNK)
            except OSError:
                data = b""
            if not data:
                poller.unregister(fd)
                open_pipes.discard(fd)
                return
            b = bufs[fd]
            b += data
            if len(b) > cap:
                del b[:len(b) - cap]

        pid, t0, err = self.spawn(req, path, argv, env, out_w, err_w)
        if pid is None:
            for fd in (out_w, err_w, out_r, err_r):
                os.close(fd)
            return dict(base, status="failed", message=err)
        pidfd = os.pidfd_open(pid)
        poller.register(pidfd, select.POLLIN)
        # We keep our own write ends open while the child lives: its pipes then
        # never reach end-of-file early, so its exit costs one wake-up (the
        # pidfd) instead of three. They are closed as soon as it has exited.
        held = [out_w, err_w]

        def release():
            while held:
                os.close(held.pop())

        run["pid"] = pid
        inflight = req.get("inflight")
        if inflight:
            self.record_inflight(inflight, pid)
        if req.get("notify", True):
            send(self.wfd, {"op": "started", "pid": pid, "pgid": pid})
        deadline = None if timeout_s is None else t0 + int(timeout_s * 1e9)

        while True:
            now = time.perf_counter_ns()
            if t1 is None:
                wait_ns = None if deadline is None else deadline - now
            else:
                if not open_pipes or now >= linger_end:
                    break
                wait_ns = linger_end - now
            if wait_ns is not None and wait_ns <= 0:
                # timeout: kill the whole tree, keep the time of the kill's reap
                timed_out = True
                self.kill_tree(run, grace_s)
                t1 = time.perf_counter_ns()
                release()
                linger_end = t1 + int(linger_s * 1e9)
                poller.unregister(pidfd)
                continue
            events = poller.poll(None if wait_ns is None else max(1, -(-wait_ns // 1_000_000)))
            if t1 is None:
                for fd, _ev in events:
                    if fd == pidfd:
                        t1 = time.perf_counter_ns()
                        release()
                        poller.unregister(pidfd)
                        linger_end = t1 + int(linger_s * 1e9)
                        break
            for fd, _ev in events:
                if fd in open_pipes:
                    drain(fd)
                elif fd == self.rfd:
                    msg = None
                    try:
                        msg = self.reader.read()
                    except Exception:  # noqa: BLE001
                        msg = None
                    if msg is None:
                        self.stop = True
                    aborted = "interrupted: the harness went away" if msg is None else \
                        "interrupted by the harness"
                    poller.unregister(self.rfd)
                    if t1 is None:
                        self.kill_tree(run, grace_s)
                        t1 = time.perf_counter_ns()
                        release()
                        poller.unregister(pidfd)
                        linger_end = t1 + int(linger_s * 1e9)
        release()
        if "rusage" not in run:
            _, status, ru = os.wait4(pid, 0)
            run["status_word"], run["rusage"] = status, ru
        # Our ends of the output pipes and the pidfd are closed once the reply
        # is sent (see `serve`): nothing reads them any more.
        self.to_close.extend((out_r, err_r, pidfd))
        # Our own children list is cheap to read; anything the run left
        # behind has an ancestor in it (orphans are re-parented to us), so the
        # full walk and the reaping only happen when it shows something new.
        kids = self.own_children()
        if kids is None or kids:
            self.reap_orphans(run)  # also reaps leftovers of earlier runs that died
        if kids is None or not kids <= self.leftovers:
            left = [p for p in self.descendants() if p not in self.leftovers]
            if left:
                self.leftovers.update(left)
                extra["leftover_processes"] = len(left)

        status_word = run["status_word"]
        ru = run["rusage"]
        usage = [ru.ru_utime, ru.ru_stime, ru.ru_maxrss, ru.ru_minflt, ru.ru_majflt,
                 ru.ru_nvcsw, ru.ru_nivcsw, ru.ru_inblock, ru.ru_oublock]
        for o in run["orphans"]:
            usage[0] += o.ru_utime
            usage[1] += o.ru_stime
            usage[2] = max(usage[2], o.ru_maxrss)
            usage[3] += o.ru_minflt
            usage[4] += o.ru_majflt
            usage[5] += o.ru_nvcsw
            usage[6] += o.ru_nivcsw
            usage[7] += o.ru_inblock
            usage[8] += o.ru_oublock
        if run["orphans"]:
            extra["orphans_counted"] = len(run["orphans"])
        stdout, stderr = bytes(bufs[out_r]), bytes(bufs[err_r])
        if os.WIFSIGNALED(status_word):
            sig = os.WTERMSIG(status_word)
            exit_code = -sig
            why = f"killed by {_signame(sig)}"
        else:
            exit_code = os.waitstatus_to_exitcode(status_word)
            why = f"exit code {exit_code}"
        if aborted:
            status, message = "failed", aborted
        elif timed_out:
            status = "timeout"
            message = f"timed out after {timeout_s:g} s; the run's process tree was killed"
        elif exit_code == 0:
            status, message = "ok", ""
        else:
            status = "failed"
            tail = _tail_text(stderr)
            message = why + (f": {tail}" if tail else " (nothing on stderr)")
        return dict(base, status=status, exit_code=exit_code, wall_ns=t1 - t0,
                    rusage=tuple(usage), stdout=stdout, stderr=stderr, message=message)

    def serve(self):
        send(self.wfd, self.hello())
        while not self.stop:
            try:
                req = self.reader.read()
            except OSError:
                req = None
            if req is None or req.get("op") == "exit":
                break
            if req.get("op") == "run":
                try:
                    reply = self.run(req)
                except Exception as e:  # noqa: BLE001 - one bad request must not end the session
                    reply = {"op": "done", "status": "failed", "exit_code": None, "wall_ns": None,
                             "rusage": None, "stdout": b"", "stderr": b"", "extra": {},
                             "started_at": utc_now_iso(),
                             "message": f"the launcher could not run this: {type(e).__name__}: {e}"}
            elif req.get("op") == "ping":
                reply = {"op": "pong", "leftovers": sorted(self.leftovers)}
            else:
                continue  # a stray abort between runs: nothing to do
            if self.stop:
                break
            try:
                send(self.wfd, reply)
            except OSError:
                break
            finally:
                self.close_run_fds()

    def close_run_fds(self):
        while self.to_close:
            try:
                os.close(self.to_close.pop())
            except OSError:
                pass


def main(argv=None):
    argv = sys.argv[1:] if argv is None else argv
    rfd, wfd = int(argv[0]), int(argv[1])
    Launcher(rfd, wfd).serve()
    return 0


if __name__ == "__main__":
    sys.exit(main())
