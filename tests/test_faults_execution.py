"""Fault injection for execution: hostile level values in shell commands, processes that
are not ours at resume, a full disk, a kill in the first moments of `run`, a killed
launcher and a deleted lock.

Each test plants the fault and asserts what the tool says and does (exit code, message,
which processes live, what the folder holds); none signals a process it did not start.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from benchharness.experiment import templating as T
from benchharness.execute.runner import run_experiment

PY = sys.executable

# Values that a shell would run, split, redirect or unquote if they reached it as code.
HOSTILE = ["$(touch F)", "`touch F`", "; touch F", "a | touch F", "a && touch F",
           "a\ntouch F", "> F", "it's", 'say "hi"', "a b", "'; touch F; '", '"; touch F; "',
           "*", "", "-n", "x=1", "back\\", "\\'", "$HOME ${HOME} $$"]

# (template, what printf must print for value V) in the three contexts, and nested ones.
CONTEXTS = [
    ("printf '[%s]' {v}", "[{}]"),                        # bare
    ("printf '[%s]' \"{v}\"", "[{}]"),                    # inside double quotes
    ("printf '[%s]' '{v}'", "[{}]"),                      # inside single quotes
    ("printf '[%s]' \"pre {v} post\"", "[pre {} post]"),
    ("printf '[%s]' 'pre {v} post'", "[pre {} post]"),
    ("printf '[%s]' \"$(printf %s {v})\"", "[{}]"),       # inside $( ) inside "..."
    ("f() {{ printf '[%s]' \"{v}\"; }}; f other", "[{}]"),  # inside a function body
    ("printf '[%s]' \"${{X:-{v}}}\"", "[{}]"),            # inside ${ }
    ("cat <<EOF\n[{v}]\nEOF", "[{}]\n"),                  # here-document
    ("true # {v}\nprintf '[%s]' ok", "[ok]"),             # a comment
]


def _shells():
    out = []
    for sh in ("/bin/sh", "dash", "bash"):
        path = shutil.which(sh)
        if path and os.path.realpath(path) not in [os.path.realpath(p) for p in out]:
            out.append(path)
    return out


@pytest.mark.parametrize("shell", _shells())
@pytest.mark.parametrize("template,expected", CONTEXTS)
def test_shell_values_arrive_exactly_in_every_context(tmp_path, shell, template, expected):
    # Planted truth: printf prints exactly the value it receives; no value may create F.
    for i, value in enumerate(HOSTILE):
        d = tmp_path / str(i)
        d.mkdir()
        cmd = T.render_shell(template, lambda f, n: value)
        r = subprocess.run([shell, "-c", cmd], cwd=d, capture_output=True, text=True,
                           timeout=10)
        assert not (d / "F").exists(), (shell, template, value, cmd)
        assert r.stdout == expected.format(value), (shell, template, value, cmd, r.stderr)


def test_plain_values_are_written_in_place():
    cmd = T.render_shell("./app --n={v} \"{v}\" '{v}'", lambda f, n: "fast-1.5")
    assert cmd == "./app --n=fast-1.5 \"fast-1.5\" 'fast-1.5'"


def _exp(tmp_path, body):
    text = textwrap.dedent(body).replace("PY", PY).replace("TMP", str(tmp_path))
    p = tmp_path / "exp.yaml"
    p.write_text(text)
    return p


@pytest.mark.parametrize("where", ["{v}", "\"{v}\"", "'{v}'"])
def test_shell_experiment_runs_hostile_levels_as_data(tmp_path, where):
    # Each run writes the value it received into a file of its own.
    levels = ["$(touch F)", "`touch F`", "a; touch F", "a | touch F", "a && touch F",
              "a\ntouch F", "> F", "it's", "a b", 'say "hi"']
    p = _exp(tmp_path, """\
        experiment: hostile
        shell: true
        command: printf '%s' WHERE > "$(mktemp got.XXXXXX)"
        workdir: TMP
        host_check: off
        factors:
          v: LEVELS
        """.replace("WHERE", where).replace("LEVELS", json.dumps(levels)))
    from benchharness.experiment.file import load_experiment

    out = run_experiment(load_experiment(p), out=tmp_path / "res")
    assert not (tmp_path / "F").exists()
    assert out.counts == {"ok": len(levels)}
    got = sorted(f.read_text() for f in tmp_path.glob("got.*"))
    assert got == sorted(levels)


def test_arithmetic_placeholder_takes_whole_numbers_only(tmp_path, cli):
    ok = _exp(tmp_path, """\
        experiment: arith
        shell: true
        command: echo $(( {n} * 2 ))
        factors:
          n: ["4", "-3"]
        """)
    assert cli("plan", ok).returncode == 0
    bad = tmp_path / "bad.yaml"
    bad.write_text(ok.read_text().replace('"-3"', '"a[$(touch F)]"'))
    r = cli("plan", bad, cwd=tmp_path)
    assert r.returncode == 2
    assert "only whole numbers" in r.stderr and "a[$(touch F)]" in r.stderr
    assert "Traceback" not in r.stderr
    assert not (tmp_path / "F").exists()


def test_placeholder_in_a_quoted_here_document_is_refused(tmp_path, cli):
    p = _exp(tmp_path, """\
        experiment: heredoc
        shell: true
        command: |
          cat <<'EOF'
          {v}
          EOF
        factors:
          v: [a, b]
        """)
    r = cli("plan", p)
    assert r.returncode == 2
    assert "quoted delimiter" in r.stderr and "exp.yaml:" in r.stderr


# ---------------------------------------------------------------- processes that are not ours

import signal  # noqa: E402
import time  # noqa: E402

from benchharness.results import journal as J  # noqa: E402
from benchharness.execute import procs  # noqa: E402
from benchharness.execute.local import LocalExecutor  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent


def _wait_for(cond, timeout=20.0, what="condition"):
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        v = cond()
        if v:
            return v
        time.sleep(0.02)
    raise AssertionError(f"timed out waiting for {what}")


def _alive(pid, start):
    return procs.matches(pid, start)


def _unrelated_leader():
    """A process of our own that leads its own session and group, like an unrelated
    session leader that took a recycled id."""
    p = subprocess.Popen(["sleep", "60"], start_new_session=True)
    start = _wait_for(lambda: procs.start_ticks(p.pid), what="its start time")
    return p, start


def _inflight(folder, **rec):
    folder.mkdir(exist_ok=True)
    (folder / "inflight").write_text(json.dumps(rec).ljust(J.INFLIGHT_SIZE))


def test_resume_leaves_an_unrelated_group_that_took_the_id(tmp_path):
    p, start = _unrelated_leader()
    try:
        # The dead harness's run had this id; it started earlier than the process now holding it.
        _inflight(tmp_path, run=3, pid=p.pid, pgid=p.pid, start=[start - 500, start - 400],
                  boot=procs.boot_id(), launcher=0, lstart=0)
        assert J.kill_leftover(tmp_path) is None
        time.sleep(0.1)
        assert p.poll() is None and _alive(p.pid, start)
        # A record without an identity (older versions) is never acted on either; it says so.
        _inflight(tmp_path, run=3, pid=p.pid, pgid=p.pid, boot=procs.boot_id(), launcher=0)
        note = J.kill_leftover(tmp_path)
        assert note and "not signalled" in note and str(p.pid) in note
        assert p.poll() is None
        # A record from another boot is ignored.
        _inflight(tmp_path, run=3, pid=p.pid, pgid=p.pid, start=[start, start], boot="x")
        assert J.kill_leftover(tmp_path) is None and p.poll() is None
    finally:
        p.kill()
        p.wait()


def test_resume_stops_the_run_it_recorded(tmp_path):
    # Planted truth: the record names exactly this group (start time matches): it is stopped.
    p, start = _unrelated_leader()
    try:
        _inflight(tmp_path, run=5, pid=p.pid, pgid=p.pid, start=[start, start],
                  boot=procs.boot_id(), launcher=0, lstart=0)
        note = J.kill_leftover(tmp_path)
        assert note and f"stopped process group {p.pid}" in note and "(run 5)" in note
        assert p.wait(timeout=5) == -signal.SIGKILL
    finally:
        if p.poll() is None:
            p.kill()
            p.wait()


def test_another_experiments_launcher_is_never_killed(tmp_path):
    # The dead harness's launcher had this id; another experiment's launcher holds it now.
    with LocalExecutor() as other:
        lstart = other._hello()["start"]
        assert lstart is not None
        _inflight(tmp_path, run=1, pid=0, pgid=0, start=[0, 0], boot=procs.boot_id(),
                  launcher=other.launcher_pid, lstart=lstart - 1)
        J.kill_leftover(tmp_path)
        time.sleep(0.1)
        assert other._proc.poll() is None
        from benchharness.execute.base import RunSpec

        assert other.execute(RunSpec(argv=("true",), env=dict(os.environ))).status == "ok"


def _cli_proc(*args, cwd):
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    env["NO_COLOR"] = "1"
    return subprocess.Popen([PY, "-m", "benchharness", *map(str, args)], cwd=cwd, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _waiting_experiment(tmp_path, runs=2, queued=True):
    """Runs that wait for the file ``go`` (then end ok): a run stays in flight until told."""
    return _exp(tmp_path, f"""\
        experiment: waits
        shell: true
        command: while [ ! -e TMP/go ]; do sleep 0.02; done
        replicates: {runs}
        host_check: off
        {'' if queued else 'pad_env: true'}
        factors:
          k: [a]
        """)


def _record(folder):
    info = J.read_inflight(folder)
    return info if info and info.get("pid") else None


def _force_pid(pid: int, tries: int = 50):
    """Start an unrelated session leader with exactly ``pid`` (root: /proc/sys/kernel/ns_last_pid)."""
    for _ in range(tries):
        try:
            with open("/proc/sys/kernel/ns_last_pid", "w") as fh:
                fh.write(str(pid - 1))
        except OSError:
            return None
        p = subprocess.Popen(["sleep", "60"], start_new_session=True)
        if p.pid == pid:
            return p
        p.kill()
        p.wait()
    return None


@pytest.mark.skipif(os.geteuid() != 0, reason="forcing a process id needs root "
                                              "(/proc/sys/kernel/ns_last_pid)")
def test_pid_reuse_forced_then_resume_leaves_the_newcomer(tmp_path, cli):
    p = _waiting_experiment(tmp_path)
    out = tmp_path / "res"
    h = _cli_proc("run", p, "--out", out, "--quiet", "--no-analysis", cwd=tmp_path)
    try:
        info = _wait_for(lambda: _record(out), what="the in-flight record")
        run_pid = info["pid"]
    finally:
        h.kill()  # the harness dies other than by Ctrl-C; its launcher stops the run
        h.communicate()
    _wait_for(lambda: not procs.matches(run_pid, *info["start"]), what="the run's end")
    # A process is told apart by its start time in clock ticks (10 ms): one started in the
    # very tick of the run cannot be, and the id cannot wrap round that fast outside a test
    # that forces it. Let the newcomer start at least two ticks after the run did.
    time.sleep(0.03)
    newcomer = _force_pid(run_pid)
    if newcomer is None:
        pytest.skip("could not force the process id here (other processes took it)")
    try:
        (tmp_path / "go").write_text("")
        r = cli("run", "--resume", out, "--no-analysis", cwd=tmp_path)
        assert r.returncode == 0, r.stderr
        assert "stopped process group" not in r.stdout
        assert newcomer.poll() is None  # the session leader that took the id lives
        runs = J.read_journal(out / "runs.jsonl")
        assert sorted(x["run"] for x in runs) == [0, 1]
    finally:
        newcomer.kill()
        newcomer.wait()


@pytest.mark.parametrize("queued", [True, False], ids=["queued", "one-at-a-time"])
def test_killing_the_launcher_stops_the_run_and_says_how_to_resume(tmp_path, queued):
    p = _waiting_experiment(tmp_path, queued=queued)
    out = tmp_path / "res"
    h = _cli_proc("run", p, "--out", out, "--quiet", "--no-analysis", cwd=tmp_path)
    try:
        info = _wait_for(lambda: _record(out), what="the in-flight record")
        assert procs.matches(info["pid"], *info["start"])
        # The launcher is a child of the harness we started.
        assert procs.matches(info["launcher"], info["lstart"])
        os.kill(info["launcher"], signal.SIGKILL)
        _, err = h.communicate(timeout=30)
    finally:
        if h.poll() is None:
            h.kill()
            h.communicate()
    assert h.returncode == 2
    assert "launcher process died" in err and f"run --resume {out}" in err
    assert "Traceback" not in err
    # the harness stopped its run itself: nothing of it is left for a later resume
    assert not procs.matches(info["pid"], *info["start"])
    assert not procs.group_members(info["pgid"])


def test_deleted_lock_never_lets_a_second_harness_take_a_live_folder(tmp_path, cli):
    p = _waiting_experiment(tmp_path)
    out = tmp_path / "res"
    h = _cli_proc("run", p, "--out", out, "--quiet", "--no-analysis", cwd=tmp_path)
    try:
        info = _wait_for(lambda: _record(out), what="the in-flight record")
        (out / ".lock").unlink()
        r = cli("run", "--resume", out, "--no-analysis", cwd=tmp_path)
        assert r.returncode == 2
        assert "is writing this results folder" in r.stderr
        # the first harness's launcher and run were not touched
        assert procs.matches(info["launcher"], info["lstart"])
        assert procs.matches(info["pid"], *info["start"])
        (tmp_path / "go").write_text("")
        _, err = h.communicate(timeout=60)
    finally:
        if h.poll() is None:
            h.kill()
            h.communicate()
    assert h.returncode == 0, err
    assert [x["status"] for x in J.read_journal(out / "runs.jsonl")] == ["ok", "ok"]


def test_a_lock_naming_a_live_owner_is_refused(tmp_path):
    owner, start = _unrelated_leader()
    try:
        (tmp_path / ".lock").write_text(json.dumps(procs.identity(owner.pid)))
        with pytest.raises(J.ResultsFolderError, match=f"live benchharness \\(pid {owner.pid}\\)"):
            J.FolderLock(tmp_path)
    finally:
        owner.kill()
        owner.wait()
    # its owner gone, the same lock file no longer stands in the way
    lock = J.FolderLock(tmp_path)
    lock.release()
    assert (tmp_path / ".lock").read_text() == ""


# ---------------------------------------------------------------- a full disk

import errno  # noqa: E402
import types  # noqa: E402

from benchharness.errors import DISK_FULL_EXIT, DiskFullError  # noqa: E402
from benchharness.execute.runner import resume_experiment  # noqa: E402


def _many_runs(tmp_path, replicates, queued=True):
    return _exp(tmp_path, f"""\
        experiment: fills
        command: [true, "{{k}}"]
        replicates: {replicates}
        host_check: off
        {'' if queued else 'pad_env: true'}
        factors:
          k: [a, b]
        """)


def _failing_writes(after_lines):
    """``os`` as journal.py sees it, with journal writes failing after ``after_lines``
    lines as a filling disk makes them fail: a short write (half the line), then
    ENOSPC for every write after it."""
    state = {"lines": 0, "full": False}

    def write(fd, data):
        try:
            name = os.readlink(f"/proc/self/fd/{fd}")
        except OSError:
            name = ""
        if name.endswith("runs.jsonl"):
            if state["full"]:
                raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
            if state["lines"] >= after_lines:
                state["full"] = True
                return os.write(fd, bytes(data[:len(data) // 2]))
            state["lines"] += 1
        return os.write(fd, data)

    proxy = types.SimpleNamespace(**{k: getattr(os, k) for k in dir(os) if not k.startswith("__")})
    proxy.write = write
    return proxy


def test_disk_full_mid_run_says_so_and_leaves_the_folder_resumable(tmp_path, monkeypatch):
    from benchharness.results import journal as journal_mod
    from benchharness.experiment.file import load_experiment

    p = _many_runs(tmp_path, 6, queued=False)  # 12 runs, one at a time (the harness writes)
    out = tmp_path / "res"
    monkeypatch.setattr(journal_mod, "os", _failing_writes(after_lines=5))
    with pytest.raises(DiskFullError) as info:
        run_experiment(load_experiment(p), out=out)
    monkeypatch.undo()
    msg = str(info.value)
    assert info.value.exit_code == DISK_FULL_EXIT != 70
    assert "the disk is full" in msg and str(out) in msg and "runs.jsonl" in msg
    assert "5 of 12 runs are recorded" in msg and f"benchharness run --resume {out}" in msg
    # the half-written line was cut off again: whole lines only, nothing set aside
    assert (out / "runs.jsonl").read_bytes().endswith(b"}\n")
    assert len(J.read_journal(out / "runs.jsonl", repair=True)) == 5
    assert not (out / "runs.jsonl.torn").exists()
    # space freed: the resume finishes the plan, each run recorded once
    done = resume_experiment(out)
    runs = J.read_journal(out / "runs.jsonl")
    assert sorted(r["run"] for r in runs) == list(range(12))
    assert done.counts == {"ok": 12} and not done.interrupted


def test_disk_full_exit_code_and_one_line_from_the_command(tmp_path, monkeypatch, capsys):
    from benchharness import cli
    from benchharness.results import journal as journal_mod

    p = _many_runs(tmp_path, 3, queued=False)
    monkeypatch.setattr(journal_mod, "os", _failing_writes(after_lines=2))
    code = cli.main(["run", str(p), "--out", str(tmp_path / "res"), "--quiet"])
    err = capsys.readouterr().err
    assert code == DISK_FULL_EXIT
    assert err.count("\n") == 1 and err.startswith("benchharness: the disk is full")
    assert "Traceback" not in err and "internal error" not in err


def test_full_disk_before_the_folder_is_set_up(tmp_path, small_disk, cli):
    filler = small_disk / "filler"
    fd = os.open(filler, os.O_WRONLY | os.O_CREAT)
    try:
        while os.write(fd, b"x" * 4096):
            pass
    except OSError as e:
        assert e.errno == errno.ENOSPC
    finally:
        os.close(fd)
    r = cli("run", _many_runs(tmp_path, 2), "--out", small_disk / "res", "--quiet", cwd=tmp_path)
    assert r.returncode == DISK_FULL_EXIT, r.stderr
    assert "the disk is full" in r.stderr and "nothing was run" in r.stderr
    assert r.stderr.count("\n") == 1 and "Traceback" not in r.stderr
    assert sorted(os.listdir(small_disk)) == ["filler"]  # nothing half made is left


def test_a_journal_write_the_launcher_cannot_make_goes_to_the_harness(tmp_path):
    # /dev/full answers every write with ENOSPC: the launcher writes nothing and hands
    # the run over (written: false), then keeps serving.
    from benchharness.execute.base import RunSpec

    spec = RunSpec(argv=("true",), env=dict(os.environ))
    with LocalExecutor() as ex:
        stream = ex.open_stream("/dev/full")
        stream.submit(spec, 7, J.record_head({"run": 7, "position": 0, "block": 0,
                                              "replicate": 1, "levels": {}}, "ok"))
        stream.flush()
        events = _wait_for(lambda: stream.events(timeout_s=1), what="the run's event")
        assert [(e.key, e.written, e.measurement.status) for e in events] == [(7, False, "ok")]
        stream.release()
        stream.close()
        assert ex.execute(spec).status == "ok"


@pytest.fixture
def small_disk(tmp_path):
    """A 256 KiB tmpfs (root only), unmounted afterwards."""
    if os.geteuid() != 0 or not shutil.which("mount"):
        pytest.skip("mounting a small tmpfs needs root")
    d = tmp_path / "disk"
    d.mkdir()
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=256k", "tmpfs", str(d)],
                       capture_output=True, text=True)
    if r.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {r.stderr.strip()}")
    try:
        yield d
    finally:
        subprocess.run(["umount", "-l", str(d)], capture_output=True)


@pytest.mark.parametrize("queued", [True, False], ids=["queued", "one-at-a-time"])
def test_real_full_disk_then_resume_after_space_is_freed(tmp_path, small_disk, cli, queued):
    p = _many_runs(tmp_path, 600, queued=queued)  # 1,200 runs: more journal than the disk holds
    out = small_disk / "res"
    r = cli("run", p, "--out", out, "--quiet", "--no-analysis", cwd=tmp_path)
    assert r.returncode == DISK_FULL_EXIT, r.stderr
    assert r.stderr.startswith("benchharness: the disk is full") and r.stderr.count("\n") == 1
    assert f"run --resume {out}" in r.stderr and "Traceback" not in r.stderr
    assert "runs are recorded there and safe" in r.stderr and "runs.jsonl" in r.stderr
    assert not (out / "runs.csv.partial").exists()
    kept = J.read_journal(out / "runs.jsonl")
    assert 0 < len(kept) < 1200
    # resumed while the disk is still full: the same line, nothing lost
    r = cli("run", "--resume", out, "--quiet", "--no-analysis", cwd=tmp_path)
    assert r.returncode == DISK_FULL_EXIT, r.stderr
    assert "recorded there and safe" in r.stderr and f"--resume {out}" in r.stderr
    assert len(J.read_journal(out / "runs.jsonl")) >= len(kept)
    subprocess.run(["mount", "-o", "remount,size=16m", str(small_disk)], check=True)
    r = cli("run", "--resume", out, "--quiet", "--no-analysis", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    runs = J.read_journal(out / "runs.jsonl")
    assert sorted(x["run"] for x in runs) == list(range(1200))
    assert not (out / "runs.jsonl.torn").exists()
    assert all(x["status"] == "ok" for x in runs)


# ---------------------------------------------------------------- a kill in the first moments


def _kill_early(p, out, parent, delay_s):
    """Start `run`, SIGKILL it ``delay_s`` after the first thing appears in ``parent``."""
    before = set(os.listdir(parent))
    h = _cli_proc("run", p, "--out", out, "--quiet", "--no-analysis", cwd=parent)
    try:
        _wait_for(lambda: set(os.listdir(parent)) - before or h.poll() is not None,
                  timeout=60, what="the run's first file")
        time.sleep(delay_s)
    finally:
        h.kill()
        h.communicate()


@pytest.mark.parametrize("delay_s", [0.0, 0.005, 0.03, 0.1])
def test_a_kill_while_the_folder_is_set_up_leaves_it_resumable_or_absent(tmp_path, main_cli,
                                                                         delay_s):
    p = _many_runs(tmp_path, 2)
    parent = tmp_path / "results"
    parent.mkdir()
    out = parent / "res"
    _kill_early(p, out, parent, delay_s)   # the killed start: a process of its own
    if out.exists() and any(out.iterdir()):
        r = main_cli("run", "--resume", out, "--quiet", "--no-analysis", cwd=tmp_path)
    else:  # nothing under the final name (or an empty folder): start again there
        r = main_cli("run", p, "--out", out, "--quiet", "--no-analysis", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    assert sorted(x["run"] for x in J.read_journal(out / "runs.jsonl")) == [0, 1, 2, 3]
    # what the killed start left aside was removed by the next start (or never existed)
    assert sorted(os.listdir(parent)) == ["res"]


def test_an_empty_folder_is_named_as_such_by_resume(tmp_path, cli):
    (tmp_path / "res").mkdir()
    r = cli("run", "--resume", tmp_path / "res", cwd=tmp_path)
    assert r.returncode == 2
    assert "is empty" in r.stderr and "nothing was measured" in r.stderr
    assert f"--out {tmp_path / 'res'}" in r.stderr


def test_disk_full_under_any_other_command_is_one_line_and_75(monkeypatch, capsys):
    from benchharness import cli
    from benchharness.commands import plan as plan_cmd

    def fills(args):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), "/somewhere/report.html")

    monkeypatch.setattr(plan_cmd, "main", fills)
    code = cli.main(["plan", "x.yaml"])
    err = capsys.readouterr().err
    assert code == DISK_FULL_EXIT
    assert err == ("benchharness: the disk is full (no space left on the device writing "
                   "/somewhere/report.html); free some space and run the command again\n")


def test_values_passed_in_shell_variables_are_not_exported(tmp_path):
    cmd = T.render_shell("printf '[%s]' \"{v}\"; env", lambda f, n: "a b; c")
    assert cmd.startswith("__bhv1=")
    r = subprocess.run(["/bin/sh", "-c", cmd], capture_output=True, text=True, timeout=10)
    assert r.stdout.startswith("[a b; c]") and "__bhv" not in r.stdout


def test_resume_refuses_a_folder_whose_harness_still_drives_its_launcher(tmp_path):
    # A stand-in harness of our own (sh) with a child standing in for its launcher.
    h = subprocess.Popen(["sh", "-c", "sleep 60 & wait"], start_new_session=True)
    try:
        kids = _wait_for(lambda: open(f"/proc/{h.pid}/task/{h.pid}/children").read().split(),
                         what="the child")
        child = int(kids[0])
        hstart, cstart = procs.start_ticks(h.pid), procs.start_ticks(child)
        rec = dict(run=1, pid=0, pgid=0, start=[0, 0], boot=procs.boot_id(),
                   harness=h.pid, hstart=hstart, launcher=child, lstart=cstart)
        _inflight(tmp_path, **rec)
        with pytest.raises(J.ResultsFolderError, match=f"live benchharness \\(pid {h.pid}\\)"):
            J.kill_leftover(tmp_path)
        # a harness that lives on after its run ended (its launcher closed) holds nothing
        _inflight(tmp_path, **{**rec, "launcher": 0})
        assert J.kill_leftover(tmp_path) is None
        assert h.poll() is None and procs.matches(child, cstart)  # nothing was signalled
    finally:
        os.killpg(h.pid, signal.SIGKILL)
        h.wait()


def _csv_with_an_effect(path):
    """Two factors, 4 runs a cell; a doubles the time (a planted effect, fixed seed)."""
    import random

    rng = random.Random(3)
    lines = ["a,b,t"]
    for a in ("x", "y"):
        for b in ("u", "v"):
            for _ in range(4):
                lines.append(f"{a},{b},{(2.0 if a == 'y' else 1.0) * rng.uniform(0.95, 1.05):.5f}")
    path.write_text("\n".join(lines) + "\n")
    return path


def _disk_full_under(monkeypatch, folder):
    """Every ``Path.write_text`` under ``folder`` creates its file, then fails with ENOSPC,
    as a write onto a full disk does (the open succeeds, the data do not fit)."""
    import pathlib

    real = pathlib.Path.write_text

    def write_text(self, data, *a, **k):
        if str(self).startswith(str(folder)):
            real(self, "", *a, **k)
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real(self, data, *a, **k)

    monkeypatch.setattr(pathlib.Path, "write_text", write_text)


@pytest.mark.parametrize("command", ["analyze", "report", "choose"])
def test_an_output_file_on_a_full_disk_is_exit_75_and_leaves_no_half_file(
        tmp_path, monkeypatch, capsys, command):
    # The real commands, not a stand-in: each used to turn ENOSPC into "cannot write
    # the file (No space left on device)" with exit 2 (bad input), and left a
    # zero-byte *.tmp beside the target.
    from benchharness import cli

    src = _csv_with_an_effect(tmp_path / "runs.csv")
    full = tmp_path / "full"
    full.mkdir()
    _disk_full_under(monkeypatch, full)
    target = {"analyze": ["--json-out", str(full / "a.json")],
              "report": ["--html", str(full / "r.html"), "--markdown", str(full / "r.md")],
              "choose": ["--json-out", str(full / "c.json")]}[command]
    code = cli.main([command, str(src), "--factors", "a,b", "--response", "t", *target])
    err = capsys.readouterr().err
    assert code == DISK_FULL_EXIT, err
    assert err.count("\n") == 1 and err.startswith("benchharness: the disk is full")
    assert str(full) in err and "free some space and run the command again" in err
    assert "Traceback" not in err and "cannot write" not in err
    left = os.listdir(full)  # no half file, no *.tmp left behind (figures may be made)
    assert not [n for n in left if n.endswith((".tmp", ".json", ".html", ".md"))], left
