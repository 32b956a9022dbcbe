"""gate.json names its pair counts as the options do (`max_pairs`, `first_look_pairs`)
and still writes the earlier keys (`max_runs`, `min_runs`) with the same values."""

from __future__ import annotations

import json

import pytest


@pytest.mark.parametrize("spelling", [("--max-pairs", "--first-look-pairs"),
                                      ("--max-runs", "--min-runs")])
def test_gate_json_pair_counts_under_new_and_old_keys(main_cli, tmp_path, spelling):
    # Planted: the counts given on the command line are the ones written, whichever
    # spelling gave them (the old options are aliases with a note on stderr).
    big, first = spelling
    js = tmp_path / "g.json"
    r = main_cli("gate", "--baseline", "true", "--candidate", "true", "--seed", "1",
            big, "9", first, "7", "--out", tmp_path / "res", "--json-out", js)
    # the verdict on two equal 1 ms commands is not the point here (load may sway it)
    assert r.returncode in (0, 1, 3) and "Traceback" not in r.stderr, r.stdout + r.stderr
    for data in (json.loads(js.read_text()),
                 json.loads((tmp_path / "res" / "gate.json").read_text())):
        assert data["max_pairs"] == 9 and data["first_look_pairs"] == 7
        assert data["max_runs"] == data["max_pairs"]
        assert data["min_runs"] == data["first_look_pairs"]
        assert data["runs"] <= 2 * 9      # no more pairs than the budget
