"""`compare A B` (benchharness.history.compare) against the pooled analysis.

Reference: statsmodels OLS on the two folders' runs pooled, ln(wall_s) ~ cell x session
(one mean per cell and session), contrasts B - A per cell with `t_test`.
Values are invented with planted ratios (truth known by construction).
"""

from __future__ import annotations

import json
import re

import numpy as np
import pytest

from benchharness.errors import DataError
from benchharness.history.compare import SESSION_WARNING, compare_folders, pooled_table
from history_helpers import HOST_B, write_folder

FACTORS = {"codec": ["zlib", "lzma", "zstd"], "level": ["1", "9"]}


def _values(rng, ratios=None, n=6, noise=0.03):
    base = {("zlib", "1"): 1.0, ("zlib", "9"): 2.5, ("lzma", "1"): 4.0, ("lzma", "9"): 9.0,
            ("zstd", "1"): 0.6, ("zstd", "9"): 1.4}
    ratios = ratios or {}
    return {c: list(b * ratios.get(c, 1.0) * np.exp(rng.normal(0, noise, n)))
            for c, b in base.items()}


def _pair(tmp_path, ratios=None, host_b=None, seed=1, n_b=6):
    rng = np.random.default_rng(seed)
    a = write_folder(tmp_path / "A", "archive-codecs", FACTORS, _values(rng))
    b = write_folder(tmp_path / "B", "archive-codecs", FACTORS,
                     _values(rng, ratios, n=n_b), host=host_b)
    return a, b


def test_compare_agrees_with_pooled_ols_with_session_factor(tmp_path):
    import statsmodels.formula.api as smf

    a, b = _pair(tmp_path, ratios={("lzma", "9"): 1.2, ("zstd", "1"): 0.9}, n_b=5)
    res = compare_folders(a, b, tolerance=0.05, adjust="none")
    assert res.adjustment == "none"
    pooled, factors, *_ = pooled_table(a, b)
    df = pooled.assign(cell=pooled["codec"] + "/" + pooled["level"], ly=np.log(pooled["y"]))
    df["group"] = df["cell"] + "|" + df["session"]
    # reference: statsmodels OLS, cell x session as one mean per cell and session
    fit = smf.ols("ly ~ 0 + C(group)", data=df).fit()
    names = list(fit.params.index)
    assert res.residual_df == int(fit.df_resid)
    assert res.residual_sd == pytest.approx(np.sqrt(fit.scale), rel=1e-10)
    for c in res.cells:
        key = f"{c.cell['codec']}/{c.cell['level']}"
        contrast = np.zeros(len(names))
        contrast[names.index(f"C(group)[{key}|B]")] = 1
        contrast[names.index(f"C(group)[{key}|A]")] = -1
        t = fit.t_test(contrast)
        lo, hi = t.conf_int(alpha=0.05)[0]
        assert np.log(c.estimate) == pytest.approx(float(t.effect[0]), abs=1e-12)
        assert np.log(c.low) == pytest.approx(lo, abs=1e-10)
        assert np.log(c.high) == pytest.approx(hi, abs=1e-10)
        assert c.p_value == pytest.approx(float(t.pvalue), rel=1e-8, abs=1e-300)
    # the same model written as cell * session with treatment coding gives the
    # same residual variance (reference: statsmodels, the two-factor model)
    fit2 = smf.ols("ly ~ C(cell) * C(session)", data=df).fit()
    assert fit2.scale == pytest.approx(fit.scale, rel=1e-10)


def test_verdicts_with_planted_ratios(tmp_path):
    a, b = _pair(tmp_path, ratios={("lzma", "9"): 1.25, ("zstd", "1"): 0.75}, n_b=8)
    res = compare_folders(a, b, tolerance=0.05)
    by = {(c.cell["codec"], c.cell["level"]): c for c in res.cells}
    assert by[("lzma", "9")].verdict == "higher"
    assert "slower" in by[("lzma", "9")].wording
    assert by[("zstd", "1")].verdict == "lower"
    assert "faster" in by[("zstd", "1")].wording
    for key in (("zlib", "1"), ("zlib", "9"), ("lzma", "1"), ("zstd", "9")):
        assert by[key].verdict in ("within", "unclear")   # no planted change
    assert SESSION_WARNING in res.warnings and "benchharness gate" in SESSION_WARNING


def test_same_within_tolerance_with_precise_data(tmp_path):
    rng = np.random.default_rng(3)
    a = write_folder(tmp_path / "A", "e", {"x": ["p", "q"]},
                     {("p",): list(np.exp(rng.normal(0, 0.002, 10))),
                      ("q",): list(2 * np.exp(rng.normal(0, 0.002, 10)))})
    b = write_folder(tmp_path / "B", "e", {"x": ["p", "q"]},
                     {("p",): list(1.01 * np.exp(rng.normal(0, 0.002, 10))),
                      ("q",): list(2 * np.exp(rng.normal(0, 0.002, 10)))})
    res = compare_folders(a, b, tolerance=0.05)
    assert [c.verdict for c in res.cells] == ["within", "within"]
    p = res.cells[0]
    assert p.low < 1.01 < p.high


def test_different_hosts_and_unshared_cells_are_reported(tmp_path):
    rng = np.random.default_rng(4)
    a = write_folder(tmp_path / "A", "e", {"x": ["p", "q"]},
                     {("p",): [1.0, 1.1, 1.05], ("q",): [2.0, 2.1, 2.2]})
    b = write_folder(tmp_path / "B", "e", {"x": ["p", "q", "r"]},
                     {("p",): [1.0, 1.2, 1.1], ("r",): [3.0, 3.1]}, host=HOST_B)
    res = compare_folders(a, b)
    assert [c.cell for c in res.cells] == [{"x": "p"}]
    assert res.only_in_a == ({"x": "q"},) and res.only_in_b == ({"x": "r"},)
    assert any("different hosts" in w for w in res.warnings)
    json.dumps(res.to_json_dict())


def test_mismatched_factors_are_refused(tmp_path):
    a = write_folder(tmp_path / "A", "e", {"x": ["p"]}, {("p",): [1.0, 1.1]})
    b = write_folder(tmp_path / "B", "e", {"y": ["p"]}, {("p",): [1.0, 1.1]})
    with pytest.raises(DataError, match="compare needs the same factors"):
        compare_folders(a, b)


def test_compare_command(tmp_path, cli, main_cli):
    # the first command in a new process (the console script), the rest in this one
    a, b = _pair(tmp_path, ratios={("lzma", "9"): 1.3})
    out = tmp_path / "cmp.json"
    r = cli("compare", a, b, "--tolerance", "5%", "--json-out", out)
    assert r.returncode == 0, r.stderr
    assert "benchharness gate" in r.stderr  # a warning: standard error (docs/cli.md)
    assert "slower" in r.stdout
    data = json.loads(out.read_text())
    lz = [c for c in data["cells"] if c["cell"] == {"codec": "lzma", "level": "9"}][0]
    assert lz["verdict"] == "higher" and lz["wording"] == "slower (beyond 5%)"
    assert data["estimate"] == "ratio_b_over_a" and len(data["cells"]) == 6
    r = main_cli("compare", a, b, "--tolerance", "five")
    assert r.returncode == 2 and "not a ratio" in r.stderr and "Traceback" not in r.stderr
    r = main_cli("compare", a, tmp_path / "missing")
    assert r.returncode == 2 and "Traceback" not in r.stderr


def test_compare_agrees_with_benchharness_analysis_of_pooled_folders(tmp_path):
    # cross-check with the project's own analysis (benchharness.analysis, fitted
    # independently): the pooled table with a `session` factor, full model on the
    # log scale, one declared comparison B vs A within each cell
    from benchharness.analysis import analyze

    a, b = _pair(tmp_path, ratios={("lzma", "9"): 1.2, ("zlib", "1"): 0.93}, n_b=5)
    pooled, factors, *_ = pooled_table(a, b)
    table = pooled.rename(columns={"y": "wall_s"}).assign(status="ok")
    cells = [dict(zip(factors, k)) for k in
             pooled[factors].drop_duplicates().itertuples(index=False)]
    declared = [{"session": ["B", "A"], "within": c} for c in cells]
    res_an = analyze(table, response="wall_s", factors=[*factors, "session"],
                     transform="log", model="full", block=False, compare=declared, art=False)
    rows = [r for r in res_an.comparisons if r["method"] == "declared"]
    assert len(rows) == len(cells)
    m = len(cells)
    # the analysis gives its declared family Bonferroni intervals: so does compare
    # with simultaneous=True (and, the same, per-cell level 1 - 0.05/m)
    ours = compare_folders(a, b, simultaneous=True)
    same = compare_folders(a, b, conf_level=1 - 0.05 / m, adjust="none")
    assert [c.low for c in ours.cells] == pytest.approx([c.low for c in same.cells])
    by = {tuple(c.cell[f] for f in factors): c for c in ours.cells}
    for r in rows:
        c = by[tuple(r["within"][f] for f in factors)]
        assert c.estimate == pytest.approx(r["ratio"], rel=1e-9)
        assert c.low == pytest.approx(r["lower"], rel=1e-9)
        assert c.high == pytest.approx(r["upper"], rel=1e-9)
        assert c.p_value == pytest.approx(r["p"], rel=1e-6)


# ------------------------------------------------- adjustment across cells

CELLS16 = {"codec": ["zlib", "lzma", "zstd", "brotli"], "input": ["logs", "json", "csv", "bin"]}


def _pooled16(rng, n=5, noise=0.05, ratios=None):
    """A pooled table (as `pooled_table` returns) of two folders of one program, 16 cells."""
    import itertools

    import pandas as pd

    ratios = ratios or {}
    rows = []
    for k, cell in enumerate(itertools.product(*CELLS16.values())):
        base = 0.5 + 0.25 * k
        for session in ("A", "B"):
            r = ratios.get(cell, 1.0) if session == "B" else 1.0
            for y in base * r * np.exp(rng.normal(0, noise, n)):
                rows.append({"codec": cell[0], "input": cell[1], "session": session, "y": y,
                             "_cell": "\x1f".join(cell)})
    return pd.DataFrame(rows)


def _family_flags(n_pairs, seed, tolerance, adjust):
    from benchharness.history.compare import compare_pooled

    rng = np.random.default_rng(seed)
    flagged = 0
    for _ in range(n_pairs):
        *_, cells = compare_pooled(_pooled16(rng), list(CELLS16), tolerance=tolerance,
                                   adjust=adjust)
        flagged += any(c.verdict in ("higher", "lower") for c in cells)
    return flagged


def test_sidak_flags_match_statsmodels_adjusted_p_values(tmp_path):
    # reference: statsmodels multipletests(method="sidak") adjusts p-values as
    # 1 - (1 - p)^m; at tolerance 0 a cell is flagged exactly when its adjusted p < 0.05
    from statsmodels.stats.multitest import multipletests

    from benchharness.history.compare import compare_pooled, per_cell_level

    assert per_cell_level(0.95, 16, "sidak") == pytest.approx(0.95 ** (1 / 16))
    assert per_cell_level(0.95, 16, "bonferroni") == pytest.approx(1 - 0.05 / 16)
    rng = np.random.default_rng(11)
    pooled = _pooled16(rng, ratios={("lzma", "json"): 1.2, ("zstd", "bin"): 1.05,
                                    ("zlib", "csv"): 0.85})
    *_, cells = compare_pooled(pooled, list(CELLS16), tolerance=0.0, adjust="sidak")
    reject, p_adj, *_ = multipletests([c.p_value for c in cells], alpha=0.05, method="sidak")
    flagged = [c.verdict in ("higher", "lower") for c in cells]
    assert flagged == list(reject)
    assert 0 < sum(flagged) < 16       # the check has both outcomes in it


def test_same_program_pairs_flag_nothing_at_the_stated_rate():
    # planted truth: 200 pairs of folders of one program (16 cells, 5 runs each, 5 % noise);
    # family-wise: a pair counts once if any of its 16 cells is flagged
    from scipy import stats

    n = 200
    strict = _family_flags(n, seed=2024, tolerance=0.0, adjust="sidak")
    default = _family_flags(n, seed=2025, tolerance=0.05, adjust="sidak")
    unadjusted = _family_flags(n, seed=2024, tolerance=0.0, adjust="none")
    # one-sided binomial test against the stated 5 % (scipy): not significantly above
    assert stats.binomtest(strict, n, 0.05, alternative="greater").pvalue > 0.01, strict
    assert default <= strict
    # per-cell intervals would flag one pair in two (1 - 0.95^16 = 0.56): the
    # adjustment is what holds the rate
    assert unadjusted / n > 0.35, unadjusted


@pytest.mark.slow
def test_same_program_pairs_flag_nothing_at_the_stated_rate_long():
    # the figures in docs/history.md (4,000 pairs per row)
    n = 4000
    for tol, seed in ((0.0, 7), (0.05, 8)):
        flags = _family_flags(n, seed=seed, tolerance=tol, adjust="sidak")
        assert flags / n <= 0.05, (tol, flags / n)


def test_a_planted_1_3x_cell_is_still_flagged_among_16(tmp_path, main_cli):
    import itertools

    rng = np.random.default_rng(5)
    base = {c: 0.5 + 0.25 * k for k, c in enumerate(itertools.product(*CELLS16.values()))}

    def values(ratio_cell=None):
        return {c: list(b * (1.3 if c == ratio_cell else 1.0) * np.exp(rng.normal(0, 0.05, 5)))
                for c, b in base.items()}

    a = write_folder(tmp_path / "A", "archive-codecs", CELLS16, values())
    same = write_folder(tmp_path / "B", "archive-codecs", CELLS16, values())
    slower = write_folder(tmp_path / "C", "archive-codecs", CELLS16, values(("zstd", "csv")))
    r = main_cli("compare", a, same, "--json-out", tmp_path / "same.json")
    assert r.returncode == 0, r.stderr
    assert "Sidak" in r.stdout and "all 16 cells together at 95%" in r.stdout
    assert "slower (beyond" not in r.stdout and "faster (beyond" not in r.stdout
    assert "slower beyond" not in r.stdout.splitlines()[0]
    data = json.loads((tmp_path / "same.json").read_text())
    assert data["interval_adjustment"] == "sidak"
    assert data["per_cell_conf_level"] == pytest.approx(0.95 ** (1 / 16))
    r = main_cli("compare", a, slower, "--json-out", tmp_path / "slow.json")
    assert r.returncode == 0, r.stderr
    cells = json.loads((tmp_path / "slow.json").read_text())["cells"]
    flagged = [c["cell"] for c in cells if c["verdict"] != "within" and c["verdict"] != "unclear"]
    assert flagged == [{"codec": "zstd", "input": "csv"}]
    assert [c["wording"] for c in cells if c["cell"] == flagged[0]] == ["slower (beyond 5%)"]
    # the first line says it in plain words (planted: one cell 1.3× as slow); the
    # numbers carry units and ratios read 1.30×, intervals "a to b"
    head = r.stdout.splitlines()[0]
    assert head.startswith("B against A, wall_s: 1 cell slower beyond 5%"), head
    assert "(of 16 shared cells)" in head and "faster" not in head
    assert " s " in r.stdout and "×" in r.stdout and "× to " in r.stdout
    assert not re.search(r"\d-\d\.\d", r.stdout)     # no "1.01-1.10" intervals left
    r = main_cli("compare", a, same, "--adjust", "none")
    assert r.returncode == 0 and "per cell" in r.stdout and "not adjusted" in r.stdout
    r = main_cli("compare", a, same, "--adjust", "holm")
    assert r.returncode == 2 and "Traceback" not in r.stderr
