"""What the launcher keeps of a run's output (execute/launcher.py).

The last ``capture_bytes`` of each stream are kept, whatever the run writes before.

The launcher keeps reading a run's output pipes for ``linger_s`` after the run itself
exits, so that the last words of a child it left behind are kept. Planted truth: a background child that writes 0.3 s
after the run exits is heard with a 3 s linger and not with none. Written to kill a
mutant that survived the rest of the suite (DEVELOPERS.md, "Mutation testing").
"""

from __future__ import annotations

import os
import sys

from benchharness.execute.base import RunSpec
from benchharness.execute.local import LocalExecutor

ENV = {"PATH": os.environ.get("PATH", "/usr/bin:/bin")}
SCRIPT = "echo early; (sleep 0.3; echo late) & exit 0"


def test_output_written_after_exit_is_read_within_the_linger():
    with LocalExecutor(kill_grace_s=0.3, linger_s=3.0) as ex:
        m = ex.execute(RunSpec(argv=("sh", "-c", SCRIPT), env=ENV))
    assert m.status == "ok", m.message
    assert m.stdout_tail.split() == [b"early", b"late"]


def test_output_after_the_linger_is_given_up():
    with LocalExecutor(kill_grace_s=0.3, linger_s=0.0) as ex:
        m = ex.execute(RunSpec(argv=("sh", "-c", SCRIPT), env=ENV))
    assert m.stdout_tail.split() == [b"early"]


def test_only_the_last_capture_bytes_of_a_long_output_are_kept():
    # Planted truth: the run prints 0 .. 29999, one a line (168,890 bytes), in small
    # writes; the tail kept is the last capture_bytes of exactly that text, on each stream.
    text = "".join(f"{i}\n" for i in range(30000)).encode()
    code = ("import sys\nfor i in range(30000):\n    sys.stdout.write(f'{i}\\n')\n"
            "    sys.stderr.write(f'{i}\\n')\n    sys.stdout.flush(); sys.stderr.flush()")
    with LocalExecutor(kill_grace_s=0.3, linger_s=0.1) as ex:
        for cap in (65536, 1000):
            m = ex.execute(RunSpec(argv=(sys.executable, "-c", code), env=ENV,
                                   capture_bytes=cap))
            assert m.status == "ok", m.message
            assert m.stdout_tail == text[-cap:]
            assert m.stderr_tail == text[-cap:]


def test_output_still_in_the_pipe_at_exit_keeps_its_last_capture_bytes():
    # a run that writes its whole output in one go and exits at once: most of it is read
    # after the exit is seen (the launcher's last read of the pipes); the tail kept is
    # still the last capture_bytes. Twenty runs, so that both orders of "output read"
    # and "exit seen" occur.
    text = "".join(f"{i:04d}\n" for i in range(1000)).encode()      # 5000 bytes
    with LocalExecutor(kill_grace_s=0.3, linger_s=0.1) as ex:
        for _ in range(20):
            m = ex.execute(RunSpec(argv=("printf", "%s", text.decode()), env=ENV,
                                   capture_bytes=1000))
            assert m.status == "ok", m.message
            assert m.stdout_tail == text[-1000:]


def test_a_run_stopped_at_its_time_limit_keeps_what_it_said_while_stopping():
    # Planted truth: the run answers SIGTERM by tidying up for 0.2 s, writing a line to
    # stderr, then exiting. The launcher stops it at its time limit (0.5 s), gives it
    # kill_grace_s (2 s) before SIGKILL, and then reads the pipes for linger_s, so the
    # line is in the run's stderr tail.
    script = ('trap "sleep 0.2; echo stopping >&2; exit 3" TERM; echo started; '
              'sleep 30 & wait')
    with LocalExecutor(kill_grace_s=2.0, linger_s=1.0) as ex:
        m = ex.execute(RunSpec(argv=("sh", "-c", script), env=ENV, timeout_s=0.5))
    assert m.status == "timeout", m.message
    assert m.stdout_tail.split() == [b"started"]
    assert b"stopping" in m.stderr_tail.split(), m.stderr_tail  # (sh may add "Terminated")


def test_orphans_add_each_usage_figure_to_its_own_and_the_peak_is_the_largest():
    # Planted: two orphans with distinct figures (powers of ten) in every field of their
    # resource usage. Each sum lands in its own place; the peak RSS is the largest of the
    # run and its orphans, not a sum (the launcher's rule for reaped orphans).
    from types import SimpleNamespace

    from benchharness.execute.launcher import _with_orphans

    fields = ("ru_utime", "ru_stime", "ru_maxrss", "ru_minflt", "ru_majflt", "ru_nvcsw",
              "ru_nivcsw", "ru_inblock", "ru_oublock")
    run = tuple(1 + i for i in range(9))
    orphans = [SimpleNamespace(**{f: 10 ** (k + 1) * (i + 1) for i, f in enumerate(fields)})
               for k in range(2)]
    got = _with_orphans(run, orphans)
    want = tuple(run[i] + 10 * (i + 1) + 100 * (i + 1) for i in range(9))
    assert got[:2] == want[:2] and got[3:] == want[3:]
    assert got[2] == max(3, 30, 300)
