"""A level whose runs all failed is left out, not predicted.

Planted: `mode=bad` fails every run, `mode=good` takes 0.1 s × size. Kept in, the two
missing cells read as a half fraction and `bad` got a predicted ratio of 1.00× to `good`
with a zero-width interval: a statement no measurement supports.
"""

from __future__ import annotations

import csv
import random

from benchharness.analysis import analyze


def _table(path):
    rng = random.Random(1)
    rows = []
    for _ in range(3):
        for mode in ("good", "bad"):
            for size in ("1", "2"):
                ok = mode == "good"
                rows.append({"run": len(rows) + 1, "mode": mode, "size": size,
                             "status": "ok" if ok else "failed",
                             "wall_s": f"{0.1 * int(size) * rng.uniform(0.95, 1.05):.4f}"
                             if ok else ""})
    with open(path, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)


def test_a_level_that_never_finished_is_left_out_with_a_note(tmp_path, main_cli):
    p = tmp_path / "f.csv"
    _table(p)
    an = analyze(str(p), factors=["mode", "size"])
    assert an.fraction is None                       # not taken for a fractional design
    assert not any(e.get("level") == "bad" for e in an.effects if isinstance(e, dict))
    assert any("mode=bad" in n and "none of its 6 runs" in n for n in an.notes)
    r = main_cli("analyze", p, "--factors", "mode,size")
    assert r.returncode == 0, r.stderr
    out = r.stdout
    assert "fraction" not in out and "alias" not in out
    assert "bad" not in out.split("Analysis of variance")[0].replace("mode=bad:", "")
    assert "size=2 2.0" in out                       # the planted 2× is still found
