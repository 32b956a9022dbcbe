"""Reading a tidy CSV for analysis (`benchharness.results.source.load_table`).

A large CSV's factor columns (and ``status``) are coded by pandas' C parser while it
reads them, with the levels learnt from the first rows (`HEAD_ROWS`, made small
here so the files stay small); everything else falls back to reading the columns as
text. Both must give the same table: the levels exactly as written, in order of
first appearance. The reference is Python's own ``csv`` module (outside the
project), and the analysis of the same file must say the same thing either way.
"""

from __future__ import annotations

import csv
import json

import numpy as np
import pytest

from benchharness.results import source


def _write(path, rows, header):
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(header)
        w.writerows(rows)
    return path


def _levels_by_csv_module(path, column):
    """(labels in order of first appearance, code of each row), read by Python's csv."""
    with open(path, newline="") as fh:
        values = [row[column] for row in csv.DictReader(fh)]
    labels = list(dict.fromkeys(values))
    return labels, [labels.index(v) for v in values]


def _timing_rows(n, rng, late=None):
    """Invented timings: `level` 1.10 is 1.25x slower than 1, 1.0 and 01 (equal)."""
    rows = []
    for i in range(n):
        level = ("1.10", "1", "1.0", "01")[i % 4]
        if late is not None and i >= late and i % 5 == 0:
            level = "2"          # first seen only after `late` rows
        mode = ("on", "off")[(i // 4) % 2]
        status = "warmup" if i < 3 else ("failed" if i % 97 == 0 else "ok")
        y = 0.2 * (1.25 if level == "1.10" else 1.0) * float(np.exp(rng.normal(0, 0.05)))
        rows.append([i, level, mode, status, f"{y:.6f}" if status == "ok" else ""])
    return rows


HEADER = ["run", "level", "mode", "status", "wall_s"]


def test_large_csv_is_coded_while_read_with_levels_as_written(tmp_path, monkeypatch):
    monkeypatch.setattr(source, "HEAD_ROWS", 200)
    path = _write(tmp_path / "t.csv", _timing_rows(1000, np.random.default_rng(3)), HEADER)
    import pandas as pd

    header = pd.read_csv(path, nrows=0)
    assert source._read_coded(path, header, ["level", "mode"]) is not None  # the fast path
    df, exp = source.load_table(path, ["level", "mode"])
    assert exp is None
    for f in ("level", "mode"):
        labels, codes = _levels_by_csv_module(path, f)
        # levels exactly as written: 1.10, 1, 1.0 and 01 stay four levels (pandas' own
        # category inference would make numbers of them and merge 1 with 1.0)
        assert list(df[f].cat.categories) == labels
        assert df[f].cat.codes.tolist() == codes
    assert list(df["level"].cat.categories) == ["1.10", "1", "1.0", "01"]
    # the status keeps its text; an empty cell is missing, as in the text reading
    with open(path, newline="") as fh:
        status = [r["status"] for r in csv.DictReader(fh)]
    assert df["status"].astype(object).where(df["status"].notna(), "").tolist() == status


@pytest.mark.parametrize("case", ["late level", "numeric status", "small file"])
def test_files_the_fast_path_cannot_take_read_as_text(tmp_path, monkeypatch, case):
    monkeypatch.setattr(source, "HEAD_ROWS", 200)
    rng = np.random.default_rng(4)
    rows = _timing_rows(150 if case == "small file" else 1000, rng,
                        late=600 if case == "late level" else None)
    if case == "numeric status":
        for r in rows:
            r[3] = ("0", "1", "1.0")[r[0] % 3]
    path = _write(tmp_path / "t.csv", rows, HEADER)
    import pandas as pd

    assert source._read_coded(path, pd.read_csv(path, nrows=0), ["level", "mode"]) is None
    df, _ = source.load_table(path, ["level", "mode"])
    labels, codes = _levels_by_csv_module(path, "level")
    assert list(df["level"].cat.categories) == labels
    assert df["level"].cat.codes.tolist() == codes
    if case == "late level":
        assert labels[-1] == "2"
    if case == "numeric status":   # read as the text reading always read it
        assert df["status"].tolist() == pd.read_csv(path)["status"].tolist()


def test_analysis_of_a_large_csv_says_the_same_either_way(tmp_path, monkeypatch, capsys):
    """The planted truth (1.10 is 1.25x slower; 1, 1.0 and 01 are equal) is found, and
    the JSON is byte-identical whether the file is coded while read or read as text."""
    from benchharness.cli import main

    rows = _timing_rows(1000, np.random.default_rng(5))
    path = _write(tmp_path / "t.csv", rows, HEADER)
    outs = {}
    for head_rows in (200, 10**9):          # coded while read / read as text
        monkeypatch.setattr(source, "HEAD_ROWS", head_rows)
        out = tmp_path / f"a{head_rows}.json"
        assert main(["analyze", str(path), "--factors", "level,mode",
                     "--json-out", str(out)]) == 0
        text = capsys.readouterr().out
        outs[head_rows] = (out.read_bytes(), text)
    assert outs[200] == outs[10**9]
    d = json.loads(outs[200][0])
    assert d["factors"][0] == {"name": "level", "levels": ["1.10", "1", "1.0", "01"]}
    assert d["counts"]["rows"] == sum(r[3] == "ok" for r in rows) == 987
    p = {row["term"]: row["p"] for row in d["anova"] if row["term"] != "Residual"}
    assert p["level"] < 0.001 and p["mode"] > 0.05
    assert "level matters" in outs[200][1]


def test_analyze_of_a_csv_imports_only_what_it_uses(tmp_path):
    """`analyze` of a CSV reads no experiment file and no results folder, so the YAML
    machinery, the journal, the fraction designs and the figures stay unimported (start-up cost,
    issue 18); the analysis still answers (a fresh interpreter: other tests load them)."""
    import os
    import subprocess
    import sys
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    path = _write(tmp_path / "t.csv", _timing_rows(60, np.random.default_rng(6)), HEADER)
    code = ("import sys\nfrom benchharness.cli import main\n"
            f"rc = main(['analyze', {str(path)!r}, '--factors', 'level', '--json-out', "
            f"{str(tmp_path / 'a.json')!r}])\n"
            "print('RC', rc, 'LOADED', sorted(m for m in ('yaml', 'benchharness.results.journal', "
            "'benchharness.experiment.space', 'benchharness.design.fractional', "
            "'benchharness.report.figures') "
            "if m in sys.modules))\n"
            "import os\nfrom threadpoolctl import threadpool_info\n"
            "print('THREADS', sorted({i['num_threads'] for i in threadpool_info()}), "
            "'ENV', os.environ.get('OPENBLAS_NUM_THREADS'))")
    env = {k: v for k, v in os.environ.items() if k != "OPENBLAS_NUM_THREADS"}
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=root,
                       env=env)
    assert "RC 0 LOADED []" in r.stdout, r.stdout + r.stderr
    # every BLAS copy was loaded with one thread (no idle workers spinning), and the
    # variable that asked for it is gone again (a child of this process would not see it)
    assert "THREADS [1] ENV None" in r.stdout, r.stdout + r.stderr
    assert json.loads((tmp_path / "a.json").read_text())["factors"][0]["name"] == "level"
