"""The `benchharness choose` command on a results folder and on a CSV (planted answers)."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from benchharness.execute.base import Measurement

EXPERIMENT = """\
experiment: pool-size
about: Which thread pool size should the image service ship with?
command: [serve-bench, --threads, "{threads}", --disk, "{disk}"]
factors:
  threads: [4, 8, 16]
  disk: [ssd, nvme, hdd]
replicates: 5
seed: 3
choose:
  prefer: {threads: 4}
  across: [disk]
  also: [max_rss_kib]
"""

# Planted truth: 16 threads is fastest on ssd and nvme and on average, but
# thrashes the hdd (x1.6 the best there); 8 threads is never more than x1.4
# off; 4 threads is slow but the lean one.
WALL = {("4", "ssd"): 1.30, ("4", "nvme"): 1.20, ("4", "hdd"): 1.40,
        ("8", "ssd"): 0.84, ("8", "nvme"): 0.70, ("8", "hdd"): 1.00,
        ("16", "ssd"): 0.60, ("16", "nvme"): 0.50, ("16", "hdd"): 1.60}
RSS = {"4": 40_000, "8": 70_000, "16": 130_000}


class PlantedExecutor:
    """Stands in for processes: returns times drawn around the planted truth."""

    def __init__(self, seed=0):
        self.rng = np.random.default_rng(seed)

    def execute(self, spec, on_start=None):
        t, d = spec.levels["threads"], spec.levels["disk"]
        wall = WALL[(t, d)] * float(np.exp(self.rng.normal(0, 0.03)))
        rss = int(RSS[t] * float(np.exp(self.rng.normal(0, 0.02))))
        return Measurement(status="ok", exit_code=0, wall_s=wall, user_s=wall, sys_s=0.01,
                           max_rss_kib=rss, started_at="2026-01-01T00:00:00.000000+00:00")

    def close(self):
        pass


@pytest.fixture
def folder(tmp_path):
    from benchharness.experiment.file import Experiment
    from benchharness.execute.runner import run_experiment

    exp = Experiment.from_text(EXPERIMENT, path=str(tmp_path / "pool.yaml"))
    out = run_experiment(exp, out=tmp_path / "results", executor=PlantedExecutor(1))
    return out.folder


def test_json_keys_and_planted_answer_from_a_results_folder(cli, folder, tmp_path):
    target = tmp_path / "choice.json"
    r = cli("choose", folder, "--json-out", target)
    assert r.returncode == 0, r.stderr
    d = json.loads(target.read_text())
    for key in ("best", "tied", "robust", "on_average", "pareto", "candidates", "reasons"):
        assert key in d
    assert d["across"] == ["disk"]
    assert set(d["robust"]) >= {"setting", "worst_ratio"}
    assert set(d["on_average"]) >= {"setting", "mean_ratio"}
    assert d["on_average"]["setting"] == {"threads": "16"}
    assert d["robust"]["setting"] == {"threads": "8"}
    assert d["disagreement"]["environment"] == {"disk": "hdd"}
    assert d["robust"]["worst_ratio"] == pytest.approx(1.4, rel=0.05)
    assert d["disagreement"]["on_average_ratio"] == pytest.approx(1.6, rel=0.05)
    assert d["best"] == {"threads": "16"}  # best overall mean, clearly ahead
    assert d["tied"] == [{"threads": "16"}]
    assert {"threads": "4"} in d["pareto"] and {"threads": "16"} in d["pareto"]
    assert d["prefer"] == {"threads": "4"}
    assert "Recommended default: threads=16" in r.stdout
    assert "disk=hdd" in r.stdout


def test_command_line_overrides_the_section(main_cli, folder):
    r = main_cli("choose", folder, "--across", "", "--also", "", "--json")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    # an empty value switches the section's across/also off: disk is then a
    # control factor too, so settings are threads x disk
    assert d["across"] == [] and "pareto" not in d
    assert d["factors"] == ["threads", "disk"]
    assert d["best"] == {"threads": "16", "disk": "nvme"}
    r = main_cli("choose", folder, "--confidence", "0.9", "--response", "max_rss_kib", "--json")
    d = json.loads(r.stdout)
    assert d["response"] == "max_rss_kib" and d["confidence"] == 0.9
    assert d["best"] == {"threads": "4"}


def test_csv_source_needs_factors_and_names_them(main_cli, tmp_path):
    rng = np.random.default_rng(4)
    rows = [{"codec": c, "status": "ok", "wall_s": mu * np.exp(rng.normal(0, 0.02))}
            for c, mu in [("zlib", 1.0), ("lzma", 1.5), ("bz2", 1.004)] for _ in range(6)]
    csv = tmp_path / "runs.csv"
    pd.DataFrame(rows).to_csv(csv, index=False)
    r = main_cli("choose", csv, "--json")
    assert r.returncode == 2 and "--factors" in r.stderr and "Traceback" not in r.stderr
    r = main_cli("choose", csv, "--factors", "codec", "--json")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    assert d["tied"] == [{"codec": "zlib"}, {"codec": "bz2"}]
    # no default declared: the tie goes to the better estimate, not the first listed
    means = {c["setting"]["codec"]: c["mean"] for c in d["candidates"]}
    assert d["best"] == {"codec": min(("zlib", "bz2"), key=means.get)}
    r = main_cli("choose", csv, "--factors", "codec", "--prefer", "codec=bz2", "--json")
    assert json.loads(r.stdout)["best"] == {"codec": "bz2"}


def test_bad_input_exits_2_with_one_line(main_cli, folder, tmp_path):
    for args, needle in [
        (("--prefer", "threads"), "FACTOR=LEVEL"),
        (("--prefer", "threads=3"), "not a level"),
        (("--confidence", "1.5"), "did you mean 1.5%?"),
        (("--confidence", "100%"), "below 100%"),
        (("--response", "nope_s"), "nope_s"),
    ]:
        r = main_cli("choose", folder, *args)
        assert r.returncode == 2, (args, r.stderr)
        assert needle in r.stderr and len(r.stderr.strip().splitlines()) == 1, r.stderr
    r = main_cli("choose", tmp_path / "missing")
    assert r.returncode == 2 and "Traceback" not in r.stderr


def test_malformed_choose_section_points_at_the_line(main_cli, folder):
    text = (folder / "experiment.yaml").read_text().replace("prefer: {threads: 4}",
                                                             "prefr: {threads: 4}")
    (folder / "experiment.yaml").write_text(text)
    r = main_cli("choose", folder)
    assert r.returncode == 2
    assert "experiment.yaml:10:" in r.stderr and "prefer" in r.stderr


THROUGHPUT = """\
experiment: batch-size
command: [ingest, --batch, "{batch}"]
factors:
  batch: [16, 64, 256]
replicates: 4
seed: 5
metrics:
  rows_per_s: {pattern: "rows/s: ([0-9.]+)", better: higher}
"""


class ThroughputExecutor:
    """Planted: batch 64 ingests the most rows per second; 16 is quickest to finish."""

    def __init__(self):
        self.rng = np.random.default_rng(2)

    def execute(self, spec, on_start=None):
        b = spec.levels["batch"]
        rate = {"16": 900.0, "64": 1500.0, "256": 1200.0}[b] * float(np.exp(self.rng.normal(0, 0.02)))
        wall = {"16": 0.5, "64": 0.8, "256": 1.1}[b] * float(np.exp(self.rng.normal(0, 0.02)))
        return Measurement(status="ok", exit_code=0, wall_s=wall,
                           started_at="2026-01-01T00:00:00.000000+00:00",
                           stdout_tail=f"ingested\nrows/s: {rate:.3f}\n".encode())

    def close(self):
        pass


def test_direction_comes_from_the_metrics_section(tmp_path):
    from benchharness.choose import choice_section, choose
    from benchharness.experiment.file import Experiment
    from benchharness.execute.runner import run_experiment

    exp = Experiment.from_text(THROUGHPUT, path=str(tmp_path / "batch.yaml"))
    folder = run_experiment(exp, out=tmp_path / "res", executor=ThroughputExecutor()).folder
    c = choose(folder, response="rows_per_s")
    assert c.better == "higher" and c.best == {"batch": "64"}
    assert choose(folder).best == {"batch": "16"}  # wall_s: lower is better
    s = choice_section(folder, response="rows_per_s")
    assert s["recommendation"] == {"batch": "64"}
    assert s["columns"][0] == "setting" and len(s["rows"]) == 3


@pytest.mark.parametrize("section,needle", [
    ("choose:\n  prefer: {threads: 5}\n", "'5' is not a level of threads"),
    ("choose:\n  prefer: {thread: 4}\n", "did you mean 'threads'"),
    ("choose:\n  across: disk\n  confidence: 2\n", "did you mean 2%?"),
    ("choose:\n  across: disk\n  confidence: 100%\n", "below 100%"),
    ("choose:\n  also: {a: 1}\n", "must be a list"),
    ("choose: [threads]\n", "must be a mapping"),
    ("choose:\n  across: [dsk]\n", "'dsk' is not a column of the runs"),
    ("choose:\n  also: [max_rss]\n", "'max_rss' is not a measured response"),
    ("choose:\n  response: wal_s\n", "'wal_s' is not a measured response"),
])
def test_section_errors_carry_file_and_line(section, needle):
    from benchharness.choose.config import choose_settings
    from benchharness.errors import ExperimentError
    from benchharness.experiment.file import Experiment

    text = EXPERIMENT.split("choose:")[0] + section
    exp = Experiment.from_text(text, path="pool.yaml")
    with pytest.raises(ExperimentError) as info:
        choose_settings(exp)
    assert needle in str(info.value)
    assert str(info.value).startswith("pool.yaml:")


def test_section_reads_plain_values():
    from benchharness.choose.config import choose_settings
    from benchharness.experiment.file import Experiment

    exp = Experiment.from_text(EXPERIMENT.split("choose:")[0] + (
        "choose:\n  prefer: {threads: 8}\n  across: disk\n  also: [max_rss_kib]\n"
        "  response: user_s\n  confidence: 0.9\n"), path="pool.yaml")
    assert choose_settings(exp) == {"prefer": {"threads": "8"}, "across": ["disk"],
                                    "also": ["max_rss_kib"], "response": "user_s",
                                    "confidence": 0.9}
