"""`benchharness history add|show` end to end on hand-written results folders.

Invented series with a planted step and a planted host change (truth known by
construction).
"""

from __future__ import annotations

import json
import re
from datetime import datetime, timedelta, timezone

import numpy as np
import pytest

from history_helpers import HOST_A, HOST_B, write_folder


def _history(tmp_path, n_commits=16, step_at=6, host_at=12):
    rng = np.random.default_rng(21)
    folders = []
    for i in range(n_commits):
        host = HOST_B if i >= host_at else HOST_A
        machine = 0.8 if i >= host_at else 1.0          # the new machine is faster
        vals = {}
        for codec, base in (("<fast>", 1.0), ("lzma", 3.0)):
            slow = 1.06 if (codec == "<fast>" and i >= step_at) else 1.0
            vals[(codec,)] = list(base * slow * machine * np.exp(rng.normal(0, 0.02, 5)))
        folders.append(write_folder(
            tmp_path / f"archive-{i:02d}", "archive-codecs", {"codec": ["<fast>", "lzma"]},
            vals, host=host, start=datetime(2026, 11, 1, tzinfo=timezone.utc)
            + timedelta(days=i)))
    return folders


def test_add_and_show_find_the_step_and_mark_the_host_change(tmp_path, main_cli):
    folders = _history(tmp_path)
    db = tmp_path / "hist.sqlite"
    from benchharness.history.store import add_results

    for i, f in enumerate(folders[:-1]):       # the library call the CLI makes
        assert add_results(db, f, commit=f"c{i:02d}", branch="main", cwd=tmp_path) == 2
    r = main_cli("history", "add", folders[-1], "--commit", "c15", "--branch", "main",
                 "--history-db", db)
    assert r.returncode == 0, r.stderr
    assert "2 cell rows added" in r.stdout
    r = main_cli("history", "add", *folders[:3], "--commit", "c00", "--history-db", db)
    assert r.returncode == 2 and "already recorded as commit c01" in r.stderr

    out_json, out_html = tmp_path / "t.json", tmp_path / "t.html"
    r = main_cli("history", "show", "--history-db", db, "--json-out", out_json, "--html", out_html,
            "--fail-on-regression")
    assert r.returncode == 1, r.stderr          # the planted step is an open regression
    assert "regression: archive-codecs wall_s codec=<fast> at commit c0" in r.stderr
    assert "STEP: regression" in r.stdout and "HOST CHANGED" in r.stdout
    assert "archive-codecs | wall_s (log scale) | codec=" in r.stdout   # the scale is said
    # the first line answers in plain words: the planted 6% step at c06, the host at c12
    head = r.stdout.splitlines()[0]
    assert re.match(r"History of 2 cell series: 1 step found: a regression of 1\.0[4-8]× at "
                    r"commit c06 \(codec=<fast>\); the host changed at c12 \(a known break", head), head
    data = json.loads(out_json.read_text())
    cells = {c["cell"]["codec"]: c for c in data["cells"]}
    fast, lzma = cells["<fast>"], cells["lzma"]
    assert len(fast["points"]) == 16
    steps = fast["steps"]
    assert len(steps) == 1
    assert abs(int(steps[0]["commit"][1:]) - 6) <= 1
    assert steps[0]["kind"] == "regression" and steps[0]["persists"] is True
    assert steps[0]["ratio_low"] < 1.06 < steps[0]["ratio_high"]
    # the 20% drop at the new machine is a known break, never a step
    for c in (fast, lzma):
        assert [b["commit"] for b in c["host_breaks"]] == ["c12"]
        assert c["host_breaks"][0]["kind"] == "host change"
        assert all(s["commit"] != "c12" for s in c["steps"])
    assert lzma["steps"] == []

    html = out_html.read_text()
    assert html.count("<svg") == 2
    # self-contained: nothing fetched from elsewhere
    assert not re.search(r"<(script|link|img|iframe)\b", html)
    assert not re.search(r"url\((?!#)", html) and "@import" not in html
    assert not re.search(r"(src|href)\s*=\s*[\"'](?!#|data:)", html)
    # user text is escaped
    assert "codec=&lt;fast&gt;" in html and "<fast>" not in html


def test_history_usage_errors(tmp_path, cli, main_cli):
    # the first command in a new process (the console script), the rest in this one
    f = write_folder(tmp_path / "r", "e", {"x": ["p"]}, {("p",): [1.0, 1.1]})
    plain = tmp_path / "plain"
    plain.mkdir()
    r = cli("history", "add", f, "--history-db", tmp_path / "h.sqlite", cwd=plain)
    assert r.returncode == 2 and "not a git repository; pass --commit" in r.stderr
    assert "Traceback" not in r.stderr
    r = main_cli("history", "show", "--history-db", tmp_path / "none.sqlite")
    assert r.returncode == 2 and "no history file" in r.stderr
    r = main_cli("history", "show", "--history-db", tmp_path / "none.sqlite", "--cell", "bad")
    assert r.returncode == 2 and "Traceback" not in r.stderr
    r = main_cli("--help")
    assert "history" in r.stdout and "compare" in r.stdout


@pytest.mark.browser
def test_html_page_loads_offline_in_chromium(tmp_path):
    import shutil

    from benchharness.history.render import render_html
    from benchharness.history.store import add_results, read_history
    from benchharness.history.trends import build_trends

    playwright = pytest.importorskip("playwright.sync_api")
    exe = shutil.which("chromium") or shutil.which("chromium-browser")
    if exe is None:
        pytest.skip("no Chromium on this machine")
    db = tmp_path / "h.sqlite"
    for i, f in enumerate(_history(tmp_path, n_commits=8, step_at=4, host_at=6)):
        add_results(db, f, commit=f"c{i:02d}", cwd=tmp_path)
    page_file = tmp_path / "history.html"
    page_file.write_text(render_html(build_trends(read_history(db))), encoding="utf-8")
    requests, errors = [], []
    with playwright.sync_playwright() as p:
        browser = p.chromium.launch(executable_path=exe)
        try:
            page = browser.new_page()
            page.on("request", lambda r: requests.append(r.url))
            page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
            page.on("pageerror", lambda e: errors.append(str(e)))
            page.goto(page_file.as_uri())
            assert page.locator("svg").count() == 2
            assert page.locator("svg").first.bounding_box()["width"] > 200
            assert "codec=<fast>" in page.inner_text("body")     # shown as text, not markup
        finally:
            browser.close()
    assert errors == []
    assert [u for u in requests if not u.startswith(("file:", "data:"))] == []


def test_a_step_at_the_newest_commits_fails_once_two_commits_show_it(tmp_path, main_cli):
    # planted: three commits at one speed, then three at 2.3x the time (5 runs each,
    # 2 % noise); `history show --fail-on-regression` as a nightly job runs it after
    # the third, fourth and fifth commit
    from benchharness.history.store import add_results

    rng = np.random.default_rng(77)
    db = tmp_path / "hist.sqlite"
    outs = {}
    for i in range(5):
        slow = 2.3 if i >= 3 else 1.0
        f = write_folder(tmp_path / f"nightly-{i}", "archive-codecs", {"codec": ["zlib"]},
                         {("zlib",): list(0.4 * slow * np.exp(rng.normal(0, 0.02, 5)))},
                         start=datetime(2026, 11, 1, tzinfo=timezone.utc) + timedelta(days=i))
        assert add_results(db, f, commit=f"c{i}", branch="main", cwd=tmp_path) == 1
        if i >= 2:
            outs[i] = main_cli("history", "show", "--history-db", db, "--fail-on-regression",
                          "--json-out", tmp_path / f"show{i}.json")
    assert [outs[i].returncode for i in (2, 3, 4)] == [0, 0, 1]
    assert "No step found" in outs[2].stdout and "NOT YET" not in outs[2].stdout
    # the default --confidence 95% said as a percentage chance, never the deprecated
    # "false-step level 0.05" (docs/cli.md: significance is spoken of as confidence)
    assert "(at most a 5% chance of a false step per host)" in outs[2].stdout
    assert "false-step level" not in outs[2].stdout
    four = outs[3]
    said = " ".join(four.stdout.split())     # the line under the table, unwrapped
    assert re.search(r"Newest commit c3: possible regression 2\.\d+× \(", said), said
    assert "(not yet confirmed; not counted as a step)" in said
    assert "NOT YET CONFIRMED" in four.stdout            # marked in the table too
    assert "not yet confirmed: archive-codecs wall_s codec=zlib at commit c3" in four.stderr
    assert "STEP" not in four.stdout
    data = json.loads((tmp_path / "show3.json").read_text())["cells"][0]
    assert data["steps"] == [] and data["not_yet_confirmed"][0]["commit"] == "c3"
    five = outs[4]
    assert "STEP: regression" in five.stdout and "1 step found" in five.stdout
    assert "regression: archive-codecs wall_s codec=zlib at commit c3" in five.stderr
    steps = json.loads((tmp_path / "show4.json").read_text())["cells"][0]["steps"]
    assert [s["commit"] for s in steps] == ["c3"]
    assert steps[0]["found_by"] == "newest commits" and steps[0]["persists"] is True
    assert steps[0]["ratio_low"] < 2.3 < steps[0]["ratio_high"]


def test_a_cell_mixing_scales_says_why_and_keeps_each_points_noise_in_its_own_terms(
        tmp_path, main_cli):
    """Planted: two folders of positive times with a 2% spread (summarised on the log
    scale) and one with a zero among its values (the original scale). The points cannot be
    pooled: the table says the scales differ and gives the log points' noise as a
    percentage (2.0%, not "0.0200 s"), and the JSON says each point's scale."""
    from benchharness.history.store import add_results

    db = tmp_path / "h.sqlite"
    spread = list(0.5 * np.exp(np.array([-0.02, 0.0, 0.02])))   # SD of ln exactly 0.02
    for i, values in enumerate((spread, spread, [0.0, 0.5, 0.5])):
        f = write_folder(tmp_path / f"f{i}", "mixed", {"codec": ["zlib"]},
                         {("zlib",): values},
                         start=datetime(2026, 11, 1, tzinfo=timezone.utc) + timedelta(days=i))
        assert add_results(db, f, commit=f"c{i}", branch="main", cwd=tmp_path) == 1
    r = main_cli("history", "show", "--history-db", db, "--json-out", tmp_path / "s.json")
    assert r.returncode == 0, r.stderr
    said = " ".join(r.stdout.split())
    assert "summarised on different scales" in said and "values <= 0" not in said
    assert "(mixed scales)" in said
    rows = [line for line in r.stdout.splitlines() if "│ c" in line]
    assert [row.count("2.0%") for row in rows[:2]] == [1, 1], r.stdout
    points = json.loads((tmp_path / "s.json").read_text())["cells"][0]["points"]
    assert [p["scale"] for p in points] == ["log", "log", "linear"]
