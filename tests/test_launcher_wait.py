"""How the launcher waits for a run, and what it says when it cannot start one
(execute/launcher.py).

While a run runs, the launcher sleeps until the run exits, its output arrives, or its
time limit comes: it does not wake up on a timer and share the CPU with the run
(DEVELOPERS.md, the launcher). Planted truth: a run that sleeps 1 s with a 60 s time
limit costs the launcher a handful of wake-ups (counted by the kernel in
/proc/PID/status, voluntary_ctxt_switches), not one per millisecond. Written to kill
mutants that survived the rest of the suite (DEVELOPERS.md, "Mutation testing").
"""

from __future__ import annotations

import os
import stat

import pytest

from benchharness.execute.base import RunSpec
from benchharness.execute.local import LocalExecutor

ENV = {"PATH": os.environ.get("PATH", "/usr/bin:/bin")}


def _wakeups(pid: int) -> int:
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith("voluntary_ctxt_switches:"):
                return int(line.split()[1])
    raise AssertionError("no voluntary_ctxt_switches in /proc/PID/status")


@pytest.mark.parametrize("timeout_s", [None, 60.0])
def test_the_launcher_sleeps_while_the_run_runs(timeout_s):
    with LocalExecutor(kill_grace_s=0.3, linger_s=0.1) as ex:
        ex.execute(RunSpec(argv=("true",), env=ENV))          # started and warm
        before = _wakeups(ex.launcher_pid)
        m = ex.execute(RunSpec(argv=("sleep", "1"), env=ENV, timeout_s=timeout_s))
        after = _wakeups(ex.launcher_pid)
    assert m.status == "ok", m.message
    # a timer of 1 ms would be ~1000 wake-ups; reading the request, spawning, the exit
    # and the reply take a few
    assert after - before < 100, after - before


def test_a_program_that_cannot_be_started_is_named(tmp_path):
    # an executable file that is no program (no #! line, not ELF): the kernel refuses it
    # (ENOEXEC); the message names the program, not one of its arguments
    prog = tmp_path / "not-a-program"
    prog.write_bytes(b"\x00\x01 this is no program\n")
    prog.chmod(prog.stat().st_mode | stat.S_IXUSR)
    with LocalExecutor(kill_grace_s=0.3, linger_s=0.1) as ex:
        m = ex.execute(RunSpec(argv=(str(prog), "some-argument"), env=ENV))
    assert m.status == "failed"
    assert f"cannot start {str(prog)!r}" in m.message, m.message
    assert "some-argument" not in m.message


def test_the_launcher_sleeps_while_it_lingers_for_output():
    # The run exits at once and leaves a child that holds its stdout for 0.3 s: the launcher
    # reads the pipes until their end (linger_s 3 s) and sleeps meanwhile, a handful of
    # wake-ups, not one per millisecond.
    with LocalExecutor(kill_grace_s=0.3, linger_s=3.0) as ex:
        ex.execute(RunSpec(argv=("true",), env=ENV))          # started and warm
        before = _wakeups(ex.launcher_pid)
        m = ex.execute(RunSpec(argv=("sh", "-c", "(sleep 0.3; echo late) & exit 0"), env=ENV))
        after = _wakeups(ex.launcher_pid)
    assert m.status == "ok", m.message
    assert m.stdout_tail.split() == [b"late"]
    assert after - before < 100, after - before


@pytest.mark.parametrize("sig", ["HUP", "TERM"])
def test_a_run_killed_by_a_signal_says_which(sig):
    # Planted: the run sends itself SIGHUP (signal 1, the lowest) or SIGTERM, at its
    # default action even if the suite was started with it ignored (nohup); it failed,
    # and the message names the signal, not an exit code
    import sys

    code = (f"import os, signal; signal.signal(signal.SIG{sig}, signal.SIG_DFL); "
            f"os.kill(os.getpid(), signal.SIG{sig})")
    with LocalExecutor(kill_grace_s=0.3, linger_s=0.1) as ex:
        m = ex.execute(RunSpec(argv=(sys.executable, "-c", code), env=ENV))
    assert m.status == "failed"
    assert m.message.startswith(f"killed by SIG{sig}"), m.message


@pytest.mark.parametrize("cpus", [None, (0,)])
def test_a_run_starts_with_default_signal_handling_either_way_it_is_started(cpus):
    # Python ignores SIGPIPE and SIGXFSZ, and an exec keeps what is ignored. A run starts
    # with both at their defaults (blocked-pipe writers die quietly, as in a shell),
    # whether the launcher spawns it directly or forks to pin it to CPUs first. Planted
    # truth: the run reads its own ignored-signal mask (/proc/self/status, SigIgn).
    import signal

    with LocalExecutor(kill_grace_s=0.3, linger_s=0.1) as ex:
        m = ex.execute(RunSpec(argv=("cat", "/proc/self/status"), env=ENV, cpus=cpus))
    assert m.status == "ok", m.message
    ign = int(next(ln for ln in m.stdout_tail.decode().splitlines()
                   if ln.startswith("SigIgn:")).split()[1], 16)
    for sig in (signal.SIGPIPE, signal.SIGXFSZ):
        assert not ign & (1 << (sig - 1)), hex(ign)


def test_a_run_with_a_time_limit_is_recorded_in_flight_while_it_runs(tmp_path):
    # A run still going after its first millisecond is recorded in the in-flight file (a
    # later resume stops it from there), also when it has a time limit far away. Planted
    # truth: the run itself reads the file 0.3 s after it started and prints its pid.
    import json

    path = tmp_path / "inflight"
    with LocalExecutor(kill_grace_s=0.3, linger_s=0.1) as ex:
        m = ex.execute(RunSpec(argv=("sh", "-c", f"sleep 0.3; cat {path}; echo; echo $$"),
                               env=ENV, timeout_s=60.0, run_id=7, inflight_path=str(path)))
    assert m.status == "ok", m.message
    record, pid = m.stdout_tail.decode().split("\n")[:2]
    rec = json.loads(record)
    assert (rec["run"], rec["pid"], rec["pgid"]) == (7, int(pid), int(pid))


def test_an_argument_with_a_nul_byte_is_refused_naming_the_program():
    # no program can receive a NUL byte inside an argument: the run fails at once and the
    # message names the program (argv[0]), not the argument
    with LocalExecutor(kill_grace_s=0.3, linger_s=0.1) as ex:
        m = ex.execute(RunSpec(argv=("echo", "before\x00after"), env=ENV))
    assert m.status == "failed"
    assert m.message.startswith("cannot start 'echo': "), m.message


SETUP_FAULT = """
import os, sys
from benchharness.execute import launcher as L

say = os.dup(1)                           # the launcher takes fds 1 and 2 for its runs
r1, w1 = os.pipe()
r2, w2 = os.pipe()
la = L.Launcher(r1, w2)
la._pipes()
mode = sys.argv[1]
if mode == "silent":                      # the child dies before reporting anything
    la.child_setup = lambda *a: os._exit(127)
elif mode == "early":                     # a set-up step fails before the clock reading
    def child_setup(ep_w, *a):
        os.write(ep_w, b"Ecannot pin to CPUs 0: refused by the test")
        os._exit(127)
    la.child_setup = child_setup
else:                                     # the kernel refuses to turn ASLR off
    class Refusing:
        def personality(self, x):
            return 0 if x == L.PERSONALITY_QUERY else -1
    la.libc = Refusing()
pid, t0, err = la.fork_exec("/bin/true", ["true"], {}, None, None, mode == "aslr")
os.write(say, f"{pid is None} {err}".encode())
"""


@pytest.mark.parametrize("mode, said", [
    ("silent", "the child died while being set up"),
    ("early", "cannot pin to CPUs 0: refused by the test"),
    ("aslr", "cannot turn off address-space randomization")])
def test_a_set_up_step_that_fails_in_the_child_is_reported_not_run(mode, said):
    # Planted faults, in a launcher of its own (a child Python): the forked child dies
    # without a word, reports a failed step before its clock reading, or is refused by
    # personality(). The launcher starts nothing and says why.
    import subprocess
    import sys
    from pathlib import Path

    root = Path(__file__).resolve().parent.parent
    out = subprocess.run([sys.executable, "-c", SETUP_FAULT, mode], cwd=root, text=True,
                         capture_output=True, timeout=60,
                         env={**os.environ, "PYTHONPATH": str(root)})
    assert out.returncode == 0, out.stderr
    assert out.stdout.startswith(f"True {said}"), out.stdout


def test_time_limits_are_kept_by_the_timer_run_after_run():
    # A run with a time limit is woken by a timer armed before the spawn (the wait itself
    # has no timeout). Planted truth: the limits are 0.25 s and 0.4 s; a `sleep 10` is
    # stopped after its own limit and not before it (the timer goes off a few
    # microseconds early, the wait must finish the rest); a quick run's timer must not
    # stop the next run, which has no limit and sleeps past where that timer was set,
    # nor wake the launcher over and over (a timer left readable would).
    with LocalExecutor(kill_grace_s=0.3, linger_s=0.1) as ex:
        a = ex.execute(RunSpec(argv=("sleep", "10"), env=ENV, timeout_s=0.25))
        b = ex.execute(RunSpec(argv=("true",), env=ENV, timeout_s=0.25))
        before = _wakeups(ex.launcher_pid)
        c = ex.execute(RunSpec(argv=("sleep", "0.5"), env=ENV))
        after = _wakeups(ex.launcher_pid)
        d = ex.execute(RunSpec(argv=("sleep", "10"), env=ENV, timeout_s=0.4))
    assert a.status == d.status == "timeout"
    assert "timed out after 0.25 s" in a.message and "timed out after 0.4 s" in d.message
    assert 0.25 <= a.wall_s < 5 and 0.4 <= d.wall_s < 5, (a.wall_s, d.wall_s)
    assert b.status == c.status == "ok", (b.message, c.message)
    assert c.wall_s >= 0.5
    assert after - before < 100, after - before


def test_another_childs_exit_does_not_end_the_runs_clock():
    # A run's exit wakes the launcher through SIGCHLD (a signalfd); so does the death of
    # an orphan re-parented to it. Planted truth: the run leaves a background `sleep 0.05`
    # (re-parented to the launcher, a subreaper, when its subshell exits) and itself
    # sleeps 0.3 s: the orphan's end must not be taken for the run's, so wall_s >= 0.3;
    # its usage is counted with the run's.
    with LocalExecutor(kill_grace_s=0.3, linger_s=0.1) as ex:
        m = ex.execute(RunSpec(argv=("sh", "-c", "(sleep 0.05 >/dev/null 2>&1 &); sleep 0.3"),
                               env=ENV))
        after = ex.execute(RunSpec(argv=("true",), env=ENV))
    assert m.status == "ok", m.message
    assert m.wall_s >= 0.3, m.wall_s
    assert m.extra.get("orphans_counted") == 1, m.extra
    assert after.status == "ok" and after.wall_s < 0.3
