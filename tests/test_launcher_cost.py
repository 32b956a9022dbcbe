"""The launcher's cost to what it measures: the memory floor, and output tails.

Planted truths: a do-nothing command records the launcher's own size (the
floor), a command that allocates 64 MiB records more than that; a command
whose output follows a formula leaves exactly the formula's last bytes.
"""

import ast
import csv
import json
import sys
import textwrap
from pathlib import Path

from benchharness.execute.base import RunSpec
from benchharness.execute.local import LocalExecutor
from benchharness.measure import floor as F

PATH = "/usr/bin:/bin"


def _vm_rss_kib(pid):
    with open(f"/proc/{pid}/status") as fh:
        return next(int(line.split()[1]) for line in fh if line.startswith("VmRSS:"))


def test_floor_is_the_launchers_own_size_and_what_a_tiny_command_records():
    with LocalExecutor() as ex:
        floor = ex.memory_floor
        assert floor is not None and isinstance(floor["kib"], int)
        # Outside reference: the kernel's own account of the launcher's resident
        # size (/proc/PID/status VmRSS, proc(5)). A child spawned from it starts
        # its peak from that size.
        rss = _vm_rss_kib(ex.launcher_pid)
        assert abs(floor["kib"] - rss) <= 0.1 * rss
        m = ex.execute(RunSpec(argv=("true",), env={"PATH": PATH}))
        assert m.status == "ok"
        assert F.at_floor(m.max_rss_kib, floor["kib"]) is True
        # the floor is small: the launcher loads its code compiled elsewhere
        # (about 9.5 MiB on CPython 3.11; it was 12-14 MiB compiled in place)
        assert floor["kib"] < 12 * 1024


def test_at_floor_rule():
    assert F.at_floor(10_000, 10_000) is True
    assert F.at_floor(11_000, 10_000) is True      # within 10 %
    assert F.at_floor(11_001, 10_000) is False
    assert F.at_floor(None, 10_000) is None
    assert F.at_floor(10_000, None) is None
    assert F.floor_kib({"memory_floor": {"kib": 9000, "resumed": [{"kib": 9500}]}}) == 9500
    assert F.floor_kib({}) is None and F.floor_kib({"memory_floor": {"kib": True}}) is None
    # a resumed session adds its floor, the first one stays
    session = {}
    F.record(session, {"kib": 9000, "how": "x"})
    F.record(session, {"kib": 9100, "how": "y"})
    assert session["memory_floor"]["kib"] == 9000
    assert session["memory_floor"]["resumed"] == [{"kib": 9100, "how": "y"}]
    F.record(session, None)  # an executor that measures none changes nothing
    assert len(session["memory_floor"]["resumed"]) == 1


def test_run_marks_runs_at_the_floor_and_the_report_says_so(tmp_path, main_cli):
    # Planted: mib=0 exits at once from a small shell (at the floor); mib=64
    # fills 64 MiB (well above it).
    exp = tmp_path / "floor.yaml"
    exp.write_text(textwrap.dedent(f"""\
        experiment: floor
        shell: true
        command: "if [ {{mib}} -eq 0 ]; then exit 0; fi; exec {sys.executable} -c 'b = bytearray({{mib}} << 20)'"
        factors:
          mib: ['0', '64']
        replicates: 3
        seed: 4
        host_check: off
        """))
    out = tmp_path / "res"
    # no analysis here: the report commands below make the one this test reads
    r = main_cli("run", str(exp), "--out", str(out), "--no-analysis")
    assert r.returncode == 0, r.stderr
    session = json.loads((out / "session.json").read_text())
    floor = session["memory_floor"]["kib"]
    assert 4 * 1024 < floor < 16 * 1024
    with open(out / "runs.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 6
    for row in rows:
        expect = "true" if row["mib"] == "0" else "false"
        assert row["max_rss_at_floor"] == expect, row
        if row["mib"] == "64":
            assert int(row["max_rss_kib"]) >= 64 * 1024
    # the report of peak memory says how many runs sit at the floor
    rep = main_cli("report", str(out), "--response", "max_rss_kib", "--markdown", "-")
    assert rep.returncode == 0, rep.stderr
    text = " ".join(rep.stdout.replace("\\_", "_").split())
    assert "3 of the 6 ok runs recorded a max_rss_kib within 10% of the memory floor" in text
    assert f"({floor} KiB" in text
    # ... and a report of time does not
    rep = main_cli("report", str(out), "--markdown", "-")
    assert rep.returncode == 0 and "memory floor" not in rep.stdout


def test_queued_runs_stay_at_the_floor(tmp_path):
    # The launcher holds at most QUEUE_BUDGET bytes of queued requests: holding
    # the whole pipe (1 MiB) raised /bin/true's max_rss_kib by 2 MiB, past the
    # floor's 10 %, as the queue filled.
    from benchharness.execute.runner import Progress, run_experiment
    from benchharness.experiment.file import Experiment

    text = ("experiment: q\ncommand: [true]\nfactors:\n  k: [a, b]\nreplicates: 400\n"
            f"seed: 3\nhost_check: off\nenv:\n  PATH: {PATH}\n")
    outcome = run_experiment(Experiment.from_text(text), out=tmp_path / "r",
                             progress=Progress())
    runs = outcome.runs
    assert len(runs) == 800 and set(runs["status"]) == {"ok"}
    assert runs["max_rss_at_floor"].tolist() == [True] * 800


def _numbered(n):
    return "".join(f"{i:08d}\n" for i in range(n)).encode()


def test_output_tails_are_exactly_the_last_bytes_of_a_flood():
    # 400,000 numbered lines (3.6 MB, several times the ring), written in
    # uneven pieces to stdout and stderr: each tail is the formula's last bytes.
    script = ("import sys\n"
              "data = ''.join(f'{i:08d}\\n' for i in range(400000)).encode()\n"
              "i, step = 0, 1\n"
              "while i < len(data):\n"
              "    sys.stdout.buffer.write(data[i:i + step]); sys.stdout.flush()\n"
              "    sys.stderr.buffer.write(data[i:i + step]); sys.stderr.flush()\n"
              "    i += step; step = step * 7 % 100003 + 1\n")
    expected = _numbered(400_000)
    with LocalExecutor() as ex:
        for cap in (65536, 1000, 300_000):
            m = ex.execute(RunSpec(argv=(sys.executable, "-c", script), env={"PATH": PATH},
                                   capture_bytes=cap))
            assert m.status == "ok", m.message
            assert m.stdout_tail == expected[-cap:]
            assert m.stderr_tail == expected[-cap:]
        # a quiet run after the flood carries nothing over
        m = ex.execute(RunSpec(argv=("true",), env={"PATH": PATH}))
        assert m.stdout_tail == b"" and m.stderr_tail == b""
        small = ex.execute(RunSpec(argv=("sh", "-c", "printf abc; printf de >&2"),
                                   env={"PATH": PATH}))
        assert small.stdout_tail == b"abc" and small.stderr_tail == b"de"


def test_launcher_functions_are_short():
    # Functions a reader can hold (issue 17): the launcher's run is split into
    # named steps; none is longer than about 80 lines.
    src = Path(__file__).resolve().parents[1] / "benchharness" / "execute" / "launcher.py"
    long = [(node.name, node.end_lineno - node.lineno + 1)
            for node in ast.walk(ast.parse(src.read_text()))
            if isinstance(node, ast.FunctionDef) and node.end_lineno - node.lineno + 1 > 80]
    assert long == []
