"""provenance.json stores what is common once (layout 2), and old folders still read.

Planted truths: cells that differ only in plain arguments run one program, and
the file records it once whatever the number of cells; an input file chosen by
a factor makes that factor (and only it) decide the program; hashes are those
``hashlib`` computes (the reference); a layout-1 file (the committed example
folder, written before layout 2) reads as the same programs, and a resumed
layout-1 folder still flags a changed script.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import sys
from pathlib import Path

from benchharness.measure.provenance import (collect_provenance, file_hashes, program_of,
                                             read_provenance)

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE = ROOT / "results" / "example-archive-codecs"


def _cells(tmp_path, sizes, argv_of):
    import itertools

    env = dict(os.environ)
    names = [f"f{i}" for i in range(len(sizes))]
    for combo in itertools.product(*(range(k) for k in sizes)):
        levels = {n: f"v{c}" for n, c in zip(names, combo)}
        yield levels, argv_of(levels), None, env, str(tmp_path)


def test_plain_arguments_give_one_program_recorded_once(tmp_path):
    script = tmp_path / "app.py"
    script.write_text("print('hello')\n")
    argv = lambda lv: (sys.executable, "app.py", *lv.values())  # noqa: E731
    small = collect_provenance(tmp_path, _cells(tmp_path, [2, 3], argv))
    big = collect_provenance(tmp_path, _cells(tmp_path, [10, 10, 10, 2], argv))
    for prov in (small, big):
        assert prov["layout"] == 2 and prov["programs_vary_with"] == []
        assert len(prov["programs"]) == 1
        files = prov["programs"][0]["files"]
        # reference: hashlib over the script's bytes
        assert files == [{"argument": "app.py", "path": str(script.resolve()),
                          "sha256": hashlib.sha256(script.read_bytes()).hexdigest()}]
    assert big["cell_count"] == 2000 and big["programs"][0]["cells"] == 2000
    # size does not grow with the cells: 2,000 cells take no more than 6 do (plus digits)
    assert len(json.dumps(big)) < len(json.dumps(small)) + 200


def test_the_factor_that_picks_an_input_file_decides_the_program(tmp_path):
    (tmp_path / "text.dat").write_text("words")
    (tmp_path / "binary.dat").write_bytes(b"\x00\x01")
    import itertools

    env = dict(os.environ)
    cells = []
    for codec, corpus, level in itertools.product(["zlib", "lzma"], ["text", "binary"],
                                                  ["1", "9"]):
        lv = {"codec": codec, "corpus": corpus, "level": level}
        cells.append((lv, ("/bin/cat", f"{corpus}.dat", "--level", level, codec), None, env,
                      str(tmp_path)))
    prov = collect_provenance(tmp_path, cells)
    assert prov["programs_vary_with"] == ["corpus"]
    assert [p["when"] for p in prov["programs"]] == [[{"corpus": "text"}], [{"corpus": "binary"}]]
    assert all(p["cells"] == 4 for p in prov["programs"])
    binary = program_of(prov, {"codec": "lzma", "corpus": "binary", "level": "1"})
    assert binary["files"][0]["sha256"] == hashlib.sha256(b"\x00\x01").hexdigest()
    assert file_hashes(prov)[str((tmp_path / "text.dat").resolve())] == \
        hashlib.sha256(b"words").hexdigest()


def test_layout_one_of_the_example_folder_reads_as_layout_two():
    old = json.loads((EXAMPLE / "provenance.json").read_text())
    assert "cells" in old and "layout" not in old        # written before layout 2
    new = read_provenance(EXAMPLE / "provenance.json")
    assert new["converted_from_layout"] == 1 and new["cell_count"] == len(old["cells"])
    assert new["programs_vary_with"] == []               # every cell ran the same script
    assert new["git"] == old["git"]
    hashes = {c["executable"]: c["executable_sha256"] for c in old["cells"]}
    hashes.update({f["path"]: f["sha256"] for c in old["cells"] for f in c["files"]})
    assert file_hashes(old) == file_hashes(new) == hashes
    cell = old["cells"][5]
    assert program_of(old, cell["levels"])["executable"] == cell["executable"]


def test_resuming_a_layout_one_folder_flags_a_changed_script(tmp_path):
    from benchharness.experiment.file import load_experiment
    from benchharness.measure.quality import RunQuality

    script = tmp_path / "app.py"
    script.write_text("print(1)\n")
    exp_file = tmp_path / "exp.yaml"
    exp_file.write_text(f"experiment: prov\ncommand: [{sys.executable}, {script}]\n"
                        "factors: {a: [1, 2]}\n")
    exp = load_experiment(exp_file)
    folder = tmp_path / "res"
    folder.mkdir()
    old = {"recorded_at": "2026-12-01T00:00:00+00:00", "directory": str(tmp_path), "git": None,
           "cells": [{"levels": {"a": a}, "command": [sys.executable, str(script)],
                      "executable": os.path.realpath(sys.executable),
                      "executable_sha256": hashlib.sha256(
                          Path(os.path.realpath(sys.executable)).read_bytes()).hexdigest(),
                      "files": [{"argument": str(script), "path": str(script.resolve()),
                                 "sha256": hashlib.sha256(b"print(0)\n").hexdigest()}]}
                     for a in ("1", "2")]}
    (folder / "provenance.json").write_text(json.dumps(old))
    cell = {"argv": (sys.executable, str(script)), "shell": None, "env": dict(os.environ),
            "cwd": str(tmp_path)}
    q = RunQuality(exp, folder)
    q.start([({"a": "1"}, cell), ({"a": "2"}, cell)])
    assert json.loads((folder / "provenance.json").read_text()) == old    # never overwritten
    assert (folder / "provenance.resumed-1.json").exists()
    assert any("changed" in n and "app.py" in n for n in q.notes)


def test_a_run_writes_layout_two(tmp_path, main_cli):
    exp = tmp_path / "e.yaml"
    exp.write_text("experiment: lay\ncommand: [/bin/true, '{a}', '{b}']\n"
                   "factors: {a: [1, 2, 3], b: [x, y]}\nhost_check: off\nseed: 1\n")
    r = main_cli("run", exp, "--out", tmp_path / "res", "--no-analysis")
    assert r.returncode == 0, r.stderr
    prov = json.loads((tmp_path / "res" / "provenance.json").read_text())
    assert prov["layout"] == 2 and prov["cell_count"] == 6 and len(prov["programs"]) == 1
    assert prov["programs"][0]["executable"] == os.path.realpath(shutil.which("true"))


def _experiment(tmp_path, command: str, factors: str):
    from benchharness.experiment.file import load_experiment

    p = tmp_path / "e.yaml"
    p.write_text(f"experiment: t\ncommand: {command}\nfactors: {factors}\n")
    return load_experiment(p)


def test_a_plan_whose_levels_cannot_change_the_program_renders_one_cell(tmp_path):
    from benchharness.design.plan import full_factorial_cells
    from benchharness.measure.provenance import plan_provenance

    exp = _experiment(tmp_path, "[/bin/true, '{a}', '--b={b}']",
                      "{a: [1, 2, 3, 4, 5, 6, 7, 8, 9, 10], b: [x, y, z]}")
    calls = []

    def command_of(lv):
        calls.append(lv)
        return ("/bin/true", lv["a"], f"--b={lv['b']}"), None, dict(os.environ), str(tmp_path)

    prov = plan_provenance(tmp_path, exp, full_factorial_cells(exp), command_of)
    assert len(calls) == 1                          # one cell rendered for thirty
    assert prov["cell_count"] == 30 and prov["programs"][0]["cells"] == 30
    assert prov["programs_vary_with"] == []
    # planted: a level that names an existing file makes every cell count again
    (tmp_path / "7").write_text("seven")
    calls.clear()
    prov = plan_provenance(tmp_path, exp, full_factorial_cells(exp), command_of)
    assert len(calls) == 30
    assert prov["programs_vary_with"] == ["a"] and len(prov["programs"]) == 2
    seven = program_of(prov, {"a": "7", "b": "y"})
    assert seven["cells"] == 3 and seven["when"] == [{"a": "7"}]
    assert len(program_of(prov, {"a": "1", "b": "x"})["when"]) == 9     # stored once for nine
    assert seven["files"][0]["sha256"] == hashlib.sha256(b"seven").hexdigest()  # ref: hashlib
