"""Analysing a two-level fraction: estimable effects with their aliases, Lenth, half-normal.

In a 2^(k-p) fraction only 2^(k-p) - 1 contrasts can be estimated; each
estimates a whole alias chain (``A (+ BCD)`` estimates A + BCD). We fit, by
least squares on the ±1 coding (first listed level -1), one column per alias
chain, named by its lowest-order member (Box, Hunter & Hunter, *Statistics for
Experimenters*, ch. 6). An effect is the difference between the mean response
at +1 and at -1 (twice the regression coefficient); on the log scale (the
default for times) exp(effect) is the ratio of the +1 level to the -1 level.

* Replicated designs: t tests and confidence intervals from the residual
  (pure error) mean square; the result equals ordinary least squares on the
  same columns (checked against statsmodels in the tests). An effect is
  flagged ``active`` when its Holm-adjusted (Holm 1979) p over all the
  estimated chains is below alpha (screening tests many chains at once).
* Unreplicated designs (no residual degrees of freedom): Lenth's (1989)
  pseudo standard error ``PSE = 1.5 * median{|c| : |c| < 2.5 s0}``,
  ``s0 = 1.5 * median |c|``, with margin of error ``ME = t(0.975; m/3) * PSE``
  and simultaneous margin ``SME = t(gamma; m/3) * PSE``,
  ``gamma = (1 + 0.95^(1/m)) / 2``; effects beyond ME are flagged ``likely``,
  beyond SME ``active``.
* Half-normal plot data (Daniel 1959): ordered |effect| against the
  half-normal quantiles ``Phi^-1(0.5 + 0.5 (i - 0.5) / m)``.

A block column with more than one value enters the model as block indicators;
chains confounded with blocks are then reported, not estimated.

Entry points: `analyze_fraction(runs, design, ...) -> dict` (JSON-ready),
`lenth(effects)`, `half_normal_points(effects, labels)`,
`half_normal_figure(points, path)` (matplotlib, imported lazily).
"""

from __future__ import annotations

import math
from typing import Sequence

from benchharness.design import words as W
from benchharness.errors import DataError


def lenth(effects: Sequence[float], level: float = 0.95) -> dict:
    """Lenth's (1989) pseudo standard error, margin of error and simultaneous margin."""
    import numpy as np
    from benchharness.analysis import dist as stats

    c = np.abs(np.asarray(effects, dtype=float))
    m = len(c)
    if m < 2:
        raise DataError("Lenth's method needs at least two effects")
    s0 = 1.5 * float(np.median(c))
    trimmed = c[c < 2.5 * s0]
    pse = 1.5 * float(np.median(trimmed)) if len(trimmed) else s0
    d = m / 3.0
    me = float(stats.t.ppf(0.5 + level / 2, d)) * pse
    gamma = (1 + level ** (1.0 / m)) / 2
    sme = float(stats.t.ppf(gamma, d)) * pse
    return {"s0": s0, "pse": pse, "df": d, "me": me, "sme": sme, "level": level}


def half_normal_points(effects: Sequence[float], labels: Sequence[str]) -> list[dict]:
    """Daniel's (1959) half-normal plot: |effects| ascending with their quantiles."""
    from benchharness.analysis import dist as stats

    m = len(effects)
    order = sorted(range(m), key=lambda i: abs(effects[i]))
    out = []
    for rank, i in enumerate(order, start=1):
        q = float(stats.norm.ppf(0.5 + 0.5 * (rank - 0.5) / m))
        out.append({"label": labels[i], "abs_effect": abs(float(effects[i])), "quantile": q})
    return out


def half_normal_figure(points: Sequence[dict], path, lenth_margins: dict | None = None,
                       title: str = "Half-normal plot of effects"):
    """Save a half-normal plot (PNG/SVG by suffix); returns the path."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(5.5, 4.2))
    xs = [p["abs_effect"] for p in points]
    ys = [p["quantile"] for p in points]
    ax.scatter(xs, ys, s=18, color="#2b6cb0")
    for p in points[-min(6, len(points)):]:
        ax.annotate(p["label"], (p["abs_effect"], p["quantile"]), fontsize=8,
                    xytext=(4, 0), textcoords="offset points", va="center")
    if lenth_margins:
        for key, style in (("me", "--"), ("sme", ":")):
            if lenth_margins.get(key):
                ax.axvline(lenth_margins[key], color="#c53030", linestyle=style, linewidth=1,
                           label=f"Lenth {key.upper()}")
        ax.legend(fontsize=8, loc="lower right")
    ax.set_xlabel("|effect|")
    ax.set_ylabel("half-normal quantile")
    ax.set_title(title, fontsize=10)
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
    return path


def chain_label(rep: int, aliases, shown_order: int = 3) -> str:
    """``A (+ BCD)``; long chains show aliases up to three factors and ``+ ...``."""
    visible = [(m, s) for m, s in aliases if W.order(m) > 0]
    if len(visible) > 3:
        shown = [(m, s) for m, s in visible if W.order(m) <= shown_order]
        more = len(shown) < len(visible)
    else:
        shown, more = visible, False
    if not shown and not more:
        return W.letters(rep)
    parts = [("- " if s < 0 else "+ ") + W.letters(m) for m, s in shown]
    if more:
        parts.append("+ ...")
    return f"{W.letters(rep)} (" + " ".join(parts) + ")"


def _coded(runs, design):
    import numpy as np

    names = design.factor_names
    X = np.zeros((len(runs), design.k), dtype=float)
    for i, name in enumerate(names):
        if name not in runs.columns:
            raise DataError(f"the runs have no column for factor {name!r}")
        lo, hi = design.level_labels[i]
        col = runs[name].astype(str).to_numpy()
        bad = [v for v in col if v not in (lo, hi)]
        if bad:
            raise DataError(f"factor {name!r} has the level {bad[0]!r}, which is neither "
                            f"{lo!r} (-1) nor {hi!r} (+1) of the design")
        X[:, i] = np.where(col == hi, 1.0, -1.0)
    cells = set(design.coded_cells())
    for row in X.astype(int):
        if tuple(int(v) for v in row) not in cells:
            lab = ", ".join(f"{n}={design.level_labels[j][0 if v < 0 else 1]}"
                            for j, (n, v) in enumerate(zip(names, row)))
            raise DataError(f"a run ({lab}) is not a cell of the fraction "
                            f"(defining relation {design.defining_relation_text()})")
    return X


def analyze_fraction(runs, design, response: str = "wall_s", log: bool = True,
                     alpha: float = 0.05, block_column: str = "block") -> dict:
    """Estimate every estimable effect of a two-level design from a runs table.

    ``design`` is a `benchharness.design.fractional.FractionalDesign` (p = 0
    for a full 2^k). Only ``ok`` runs (when a ``status`` column exists) with a
    finite response are used; ``log`` analyses ln(response) (needs > 0).
    """
    import numpy as np

    df = runs
    if "status" in df.columns:
        df = df[df["status"] == "ok"]
    if response not in df.columns:
        raise DataError(f"the runs have no column {response!r}")
    y = df[response].astype(float).to_numpy()
    keep = np.isfinite(y) & ((y > 0) if log else True)
    df = df[keep]
    y = y[keep]
    if len(df) == 0:
        raise DataError(f"no successful runs with a usable {response}")
    if log:
        y = np.log(y)
    X = _coded(df, design)
    blocks = df[block_column].astype(str).to_numpy() if block_column in df.columns else None
    return estimate_chains(X, y, design, response=response, scale="log" if log else "none",
                           alpha=alpha, blocks=blocks)


def _chain_columns(X, design, n: int):
    """The estimable alias classes and one product column per class (its representative word)."""
    import numpy as np

    classes = design.estimable()
    cols = []
    for rep, _al in classes:
        v = np.ones(n)
        for pos in W.positions(rep):
            v = v * X[:, pos]
        cols.append(v)
    E = np.column_stack(cols) if cols else np.zeros((n, 0))
    return classes, E


def _block_matrix(blocks, n: int):
    """Intercept plus one indicator per block label after the first."""
    import numpy as np

    parts = [np.ones((n, 1))]
    block_values = sorted(set(blocks)) if blocks is not None else []
    if len(block_values) > 1:
        b = np.asarray(blocks)
        parts.append(np.column_stack([(b == v).astype(float) for v in block_values[1:]]))
    return np.column_stack(parts)


def _split_confounded(B, E):
    """Chains in the span of the block indicators are confounded with blocks; the rest are
    estimable. Returns (confounded, estimable) column indices of ``E``."""
    import numpy as np

    confounded = []
    estimable_idx = []
    for j in range(E.shape[1]):
        coef, *_ = np.linalg.lstsq(B, E[:, j], rcond=None)
        if np.allclose(B @ coef, E[:, j], atol=1e-9):
            confounded.append(j)
        else:
            estimable_idx.append(j)
    return confounded, estimable_idx


def _least_squares(B, E, estimable_idx, y):
    """Ordinary least squares of ``y`` on the blocks and the estimable chains:
    (inverse of X'X, coefficients, residual df, residual standard deviation or None)."""
    import numpy as np

    n = len(y)
    M = np.column_stack([B, E[:, estimable_idx]]) if estimable_idx else B
    rank = np.linalg.matrix_rank(M)
    if rank < M.shape[1]:
        raise DataError("the runs do not cover the design's cells well enough to estimate every "
                        "effect (some cells have no successful run)")
    XtX_inv = np.linalg.inv(M.T @ M)
    beta = XtX_inv @ M.T @ y
    resid = y - M @ beta
    df_resid = n - M.shape[1]
    sigma = None
    if df_resid > 0:
        sigma = math.sqrt(float(resid @ resid) / df_resid)
    return XtX_inv, beta, df_resid, sigma


def _chain_row(rep, al, e, names, design) -> dict:
    """The identity of one chain's effect: letters, label, term, chain, aliases, estimate."""
    return {
        "effect": W.letters(rep), "label": chain_label(rep, al), "term": W.term(rep, names),
        "chain": chain_of(W.positions(rep), names, design)["chain"],
        "aliases": [("-" if s < 0 else "") + W.term(m, names) for m, s in al if m],
        "order": W.order(rep), "estimate": e,
    }


def _t_test_fields(e, var_factor, sigma, df_resid, alpha) -> dict:
    """Standard error, t, p and interval of one effect from the replicates' residual mean
    square (``var_factor`` is its diagonal entry of the inverse of X'X)."""
    from benchharness.analysis import dist as stats

    se = 2.0 * sigma * math.sqrt(var_factor)
    t = e / se if se > 0 else math.inf
    p = float(2 * stats.t.sf(abs(t), df_resid))
    tq = float(stats.t.ppf(1 - alpha / 2, df_resid))
    return {"se": se, "t": t, "p": p, "ci_low": e - tq * se, "ci_high": e + tq * se,
            "active": p < alpha}


def _lenth_fields(e, lenth_info) -> dict:
    """Pseudo standard error, t, p and margins of one effect without replicates."""
    from benchharness.analysis import dist as stats

    pse = lenth_info["pse"]
    t = e / pse if pse > 0 else math.inf
    return {"se": pse, "t": t,
            # Lenth's t-ratio against t with m/3 df: p < alpha exactly when
            # |effect| > ME (Lenth 1989)
            "p": float(2 * stats.t.sf(abs(t), lenth_info["df"])),
            "ci_low": e - lenth_info["me"], "ci_high": e + lenth_info["me"],
            "likely": abs(e) > lenth_info["me"], "active": abs(e) > lenth_info["sme"]}


def _add_ratios(row: dict) -> None:
    """On the log scale, the effect and its interval as ratios of the +1 to the -1 level."""
    row["ratio"] = math.exp(row["estimate"])
    if "ci_low" in row:
        row["ratio_low"] = math.exp(row["ci_low"])
        row["ratio_high"] = math.exp(row["ci_high"])


def _holm_active(out_effects: list, alpha: float) -> None:
    """Holm (1979) across the effects for the "active" flag: screening tests many chains."""
    from benchharness.analysis.comparisons import adjust_p

    for row, p_holm in zip(out_effects, adjust_p([r["p"] for r in out_effects], "holm")):
        row["p_holm"] = float(p_holm)
        row["active"] = bool(p_holm < alpha)


def _method_text(sigma, lenth_info) -> str:
    """How the effects were judged, in words."""
    return ("t tests on the replicates' residual mean square; active = Holm-adjusted "
            "p below alpha" if sigma is not None else
            "Lenth's pseudo standard error (no replicates); likely = beyond the margin "
            "of error, active = beyond the simultaneous margin" if lenth_info else
            "no error estimate")


def estimate_chains(X, y, design, response: str = "wall_s", scale: str = "log",
                    alpha: float = 0.05, blocks=None) -> dict:
    """The fraction table from coded columns: one estimate per alias chain (JSON-ready).

    ``X`` (rows x k) holds -1/+1 per design factor, ``y`` the response already on
    the analysis scale (``scale``: ``log`` gives ratios, ``none``/``boxcox`` not);
    ``blocks`` (one label per row, optional) enter as indicators.
    """
    import numpy as np

    log = scale == "log"
    y = np.asarray(y, dtype=float)
    n = len(y)
    classes, E = _chain_columns(X, design, n)
    B = _block_matrix(blocks, n)
    confounded, estimable_idx = _split_confounded(B, E)
    XtX_inv, beta, df_resid, sigma = _least_squares(B, E, estimable_idx, y)
    nb = B.shape[1]
    effects = [2.0 * float(beta[nb + i]) for i in range(len(estimable_idx))]
    lenth_info = None
    if df_resid == 0 and len(effects) >= 2:
        lenth_info = lenth(effects)
    names = design.factor_names
    out_effects = []
    for i, j in enumerate(estimable_idx):
        rep, al = classes[j]
        e = effects[i]
        row = _chain_row(rep, al, e, names, design)
        if sigma is not None:
            row.update(_t_test_fields(e, float(XtX_inv[nb + i, nb + i]), sigma, df_resid, alpha))
        elif lenth_info is not None:
            row.update(_lenth_fields(e, lenth_info))
        if log:
            _add_ratios(row)
        out_effects.append(row)
    if sigma is not None and out_effects:
        _holm_active(out_effects, alpha)
    labels = [r["label"] for r in out_effects]
    return {
        "response": response,
        "scale": scale,
        "design": f"2^({design.k}-{design.p})" if design.is_fraction else f"2^{design.k}",
        "resolution": design.resolution,
        "defining_relation": design.defining_words(),
        "generators": [g.letters() for g in design.generators],
        "letters": design.letter_map(),
        "runs_used": int(n),
        "residual_df": int(df_resid),
        "sigma": sigma,
        "alpha": alpha,
        "method": _method_text(sigma, lenth_info),
        "effect_definition": "mean at +1 minus mean at -1 (twice the coefficient)"
                             + ("; ratio = exp(effect) of the +1 level to the -1 level"
                                if log else ""),
        "effects": out_effects,
        "lenth": lenth_info,
        "half_normal": half_normal_points(effects, labels) if effects else [],
        "confounded_with_blocks": [chain_label(classes[j][0], classes[j][1])
                                   for j in confounded],
    }


def _fraction_flag(e: dict, with_p: bool) -> str:
    """The verdict word of one chain: active, or likely (Lenth's margins), or nothing."""
    if e.get("active"):
        return "active" if with_p else "active (beyond SME)"
    if e.get("likely"):
        return "likely (beyond ME)"
    return ""


def _fraction_row(e: dict, with_p: bool, with_lenth: bool) -> list:
    """The cells of one chain's line in the fraction table."""
    ratio = f"x{e['ratio']:.4f}" if "ratio" in e else ""
    row = [e.get("chain") or e["term"], e["label"], f"{e['estimate']:+.4g}", ratio]
    if with_p:
        row.append(f"{e['p']:.3g} (Holm {e['p_holm']:.3g})")
    elif with_lenth:
        row.append(f"{e['p']:.3g}" if e.get("p") is not None else "")
    return row + [_fraction_flag(e, with_p)]


def _aligned(header: list, rows: list) -> list:
    """Header and rows as left-aligned columns, each line indented by two spaces."""
    widths = [max(len(h), *(len(r[i]) for r in rows)) if rows else len(h)
              for i, h in enumerate(header)]
    lines = ["  " + "  ".join(h.ljust(w) for h, w in zip(header, widths))]
    for r in rows:
        lines.append("  " + "  ".join(c.ljust(w) for c, w in zip(r, widths)))
    return lines


def _fraction_notes(result: dict) -> list:
    """Lines after the table: Lenth's margins and the chains confounded with blocks."""
    lines = []
    if result.get("lenth"):
        ln = result["lenth"]
        lines.append(f"Lenth: PSE {ln['pse']:.4g}, margin of error {ln['me']:.4g}, simultaneous "
                     f"margin {ln['sme']:.4g} (df {ln['df']:.3g})")
    if result.get("confounded_with_blocks"):
        lines.append("confounded with blocks: " + ", ".join(result["confounded_with_blocks"]))
    return lines


def format_fraction(result: dict) -> str:
    """Plain-text table of `analyze_fraction` output."""
    lines = [f"effects of the {result['design']} design on "
             f"{'ln ' if result['scale'] == 'log' else ''}{result['response']} "
             f"({result['runs_used']} runs, residual df {result['residual_df']})"]
    if result.get("letters"):
        lines.append("  letters: " + ", ".join(f"{a}={n}" for a, n in result["letters"].items()))
    with_p = any("p_holm" in e for e in result["effects"])
    with_lenth = not with_p and any("p" in e for e in result["effects"])
    rows = [_fraction_row(e, with_p, with_lenth) for e in result["effects"]]
    header = (["alias chain", "letters", "estimate", "ratio"] + (["p"] if with_p else [])
              + (["p (Lenth)"] if with_lenth else []) + [""])
    lines.extend(_aligned(header, rows))
    lines.extend(_fraction_notes(result))
    return "\n".join(lines)


def fraction_analysis_for(exp, runs, response: str = "wall_s", log: bool = True) -> dict | None:
    """Hook for the analysis stage: the fraction analysis when ``exp`` has a two-level
    ``design:`` section (fraction or confounded blocks), else None."""
    from benchharness.design.spec import design_of

    choice = design_of(exp)
    if not choice.changes_plan:
        return None
    return analyze_fraction(runs, choice.design, response=response, log=log)


def add_to_results_folder(folder, response: str = "wall_s", log: bool = True) -> dict | None:
    """For a two-level ``design:``: add the ``fraction`` key to ``analysis.json`` (creating
    the file if needed) and save ``half_normal.png``; returns the fraction analysis or None.

    ``folder``: a results folder, or one already read (`journal.Results`, as
    `benchharness run` passes it after the general analysis).
    """
    import json
    from pathlib import Path

    from benchharness.results import journal as J

    res = folder if isinstance(folder, J.Results) else J.load_results(folder)
    folder = Path(res.path)
    result = fraction_analysis_for(res.experiment, res.runs, response=response, log=log)
    if result is None:
        return None
    path = folder / "analysis.json"
    data = {}
    if path.exists():
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError):
            data = {}
    data["fraction"] = _finite(result)
    tmp = path.with_name(path.name + ".tmp")
    try:
        tmp.write_text(json.dumps(data, indent=2, ensure_ascii=False, default=_json_default,
                                  allow_nan=False) + "\n", encoding="utf-8")
        tmp.replace(path)
    except BaseException:
        tmp.unlink(missing_ok=True)  # a full disk leaves no half file behind
        raise
    if result["half_normal"]:
        try:
            half_normal_figure(result["half_normal"], folder / "half_normal.png",
                               result.get("lenth"))
        except Exception:  # noqa: BLE001 - a figure must never cost the analysis
            pass
    return result


def _json_default(x):
    try:
        return float(x)
    except (TypeError, ValueError):
        return str(x)


def default_model(exp) -> int | None:
    """ANOVA model order for an experiment with a fraction: the order that reaches every
    estimable alias chain (`chain_order`; terms aliased with an earlier one are then left
    out by `chain_terms`). None without a fraction."""
    from benchharness.design.spec import design_of

    choice = design_of(exp)
    if not choice.changes_plan or not choice.design.is_fraction:
        return None
    return chain_order(choice.design)


def _finite(x):
    """JSON-safe copy: non-finite floats become None (strict JSON has no NaN or Infinity)."""
    if isinstance(x, dict):
        return {k: _finite(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_finite(v) for v in x]
    if isinstance(x, float) and not math.isfinite(x):
        return None
    if hasattr(x, "item") and not isinstance(x, (str, bytes)):
        try:
            return _finite(x.item())
        except (TypeError, ValueError):
            return x
    return x


# -- the fraction inside the general analysis ------------------------------------------------

def recognise(names, levels, codes, experiment=None):
    """The two-level fraction the analysed cells form, or None.

    ``names``/``levels`` are the analysis' factors with their level labels (first
    listed = -1); ``codes`` the level index of every analysed row per factor. The
    experiment's ``design:`` section is used when it describes exactly these
    factors; otherwise the fraction is recognised from the observed cells: they
    must be a coset of a subspace of GF(2)^k (a regular fraction, Box & Hunter
    1961), whose orthogonal complement is the defining relation. A full 2^k run
    exactly once per cell is returned too (p = 0: nothing aliased, but no
    replicates, so Lenth's method judges the effects). A replicated full
    factorial, a factor with other than two levels, or an irregular set of cells
    gives None.
    """
    k = len(names)
    if k < 2 or any(len(lv) != 2 for lv in levels) or k > W.MAX_FACTORS:
        return None
    from benchharness.design.fractional import FractionalDesign

    labels = tuple((str(lv[0]), str(lv[1])) for lv in levels)
    declared = _declared_fraction(experiment, names, labels)
    if declared is not None:
        return declared
    cells = _observed_cells(codes, k)
    if cells is None:
        return None
    b0, pivots = _span(cells)
    r = len(pivots)
    if len(cells) != 2 ** r:
        return None
    if r == k:
        # A full 2^k run once: no replicates, so its effects are judged by Lenth's method.
        return FractionalDesign(tuple(names), labels, ()) if len(codes[0]) == 2 ** k else None
    d = FractionalDesign(tuple(names), labels, tuple(_generators(pivots, b0, k)))
    coded = {sum(1 << i for i, c in enumerate(cell) if c < 0) for cell in d.coded_cells()}
    return d if coded == set(cells) else None


def _declared_fraction(experiment, names, labels):
    """The experiment's ``design:`` fraction when it describes exactly these factors."""
    if experiment is None:
        return None
    from benchharness.design.spec import design_of
    from benchharness.errors import BenchharnessError

    try:
        d = design_of(experiment).design
    except BenchharnessError:  # an invalid design section: plan and run report it
        return None
    if (d is not None and d.is_fraction and tuple(d.factor_names) == tuple(names)
            and tuple(d.level_labels) == labels):
        return d
    return None


def _observed_cells(codes, k):
    """The distinct cells as bit masks (bit i set where factor i sits at its first level,
    coded -1), or None when there are none or too many to recognise a fraction from."""
    import numpy as np

    if len(codes) != k or len(codes[0]) == 0:
        return None
    if len(codes[0]) > 1 << 20:
        return None   # recognising from the cells is for tables of ordinary size
    weights = (1 << np.arange(k, dtype=np.int64))
    minus = np.column_stack([np.asarray(c) == 0 for c in codes]).astype(np.int64)
    cells = [int(v) for v in np.unique(minus @ weights)]
    if len(cells) > 1 << 14:
        return None   # more cells than any fraction we would recognise from a table
    return cells


def _span(cells):
    """(first cell, reduced basis {pivot bit: row}) of the differences from the first cell
    over GF(2) (Gauss-Jordan elimination on bit masks)."""
    b0 = cells[0]
    pivots: dict[int, int] = {}
    for c in cells[1:]:
        v = c ^ b0
        for r in pivots.values():
            if v & (r & -r):
                v ^= r
        if v:
            low = (v & -v)
            for q in list(pivots):
                if pivots[q] & low:
                    pivots[q] ^= v
            pivots[low.bit_length() - 1] = v
    return b0, pivots


def _generators(pivots, b0, k):
    """One generator per factor outside the pivots: the word of pivot factors it equals,
    with the sign the coset's first cell gives it."""
    from benchharness.design.fractional import Generator

    gens = []
    for f in range(k):
        if f in pivots:
            continue
        word = 0
        for p_, row in pivots.items():
            if row >> f & 1:
                word |= 1 << p_
        sign = -1 if bin(b0 & (word | 1 << f)).count("1") % 2 else 1
        gens.append(Generator(f, word, sign))
    return gens



def _mask(term_factors, names, design) -> int:
    pos = {n: i for i, n in enumerate(design.factor_names)}
    m = 0
    for f in term_factors:
        m |= 1 << pos[names[f]]
    return m


def class_rep(design, mask: int) -> int:
    """The representative (lowest order, then first letters) of the alias chain of ``mask``;
    0 when ``mask`` is aliased with the mean (a word of the defining relation)."""
    return min((m for m, _ in design.alias_class(mask)), key=W.sort_key)


def chain_order(design) -> int:
    """Model order that reaches every estimable alias chain: the highest order of a
    chain representative (1 for resolution III 2^(3-1), 2 for resolution IV 2^(4-1))."""
    return max((W.order(rep) for rep, _ in design.estimable()), default=1)


def chain_terms(terms, names, design):
    """Keep the first term of each alias chain, drop the rest and terms aliased with the mean.

    ``terms`` are `benchharness.analysis.model.Term` in model order (lowest order
    first), indexing ``names``. Returns ``(kept, dropped)``; ``dropped`` lists
    ``(term name, name of the kept term it is aliased with, or None for the mean)``.
    A block term is always kept.
    """
    kept, dropped, seen = [], [], {}
    for t in terms:
        if t.is_block:
            kept.append(t)
            continue
        rep = class_rep(design, _mask(t.factors, names, design))
        if rep == 0:
            dropped.append((t.name, None))
        elif rep in seen:
            dropped.append((t.name, seen[rep]))
        else:
            seen[rep] = t.name
            kept.append(t)
    return kept, dropped


def chain_of(term_factors, names, design, max_shown: int = 3) -> dict:
    """How a model term is named in a fraction: ``{"chain": "a:b (+ c:d)", "aliases": [...]}``.

    The label lists the aliases of order up to two (or up to the term's own order, for
    a chain of higher-order interactions), at most ``max_shown`` of them then ``+ ...``;
    ``aliases`` lists every other member of the chain, ``-`` marking a negative sign
    (``D = -ABC`` makes ``a:b:c`` enter with the opposite sign).
    """
    dnames = design.factor_names
    mask = _mask(term_factors, names, design)
    name = ":".join(names[f] for f in term_factors)
    others = [(m, s) for m, s in design.alias_set(mask) if m]
    limit = max(2, W.order(mask))
    shown = [(m, s) for m, s in others if W.order(m) <= limit]
    more = len(shown) > max_shown
    shown = shown[:max_shown]
    label = name
    if shown:
        parts = [("- " if s < 0 else "+ ") + W.term(m, dnames) for m, s in shown]
        if more:
            parts.append("+ ...")
        label = f"{name} (" + " ".join(parts) + ")"
    return {"chain": label,
            "aliases": [("-" if s < 0 else "") + W.term(m, dnames) for m, s in others]}


def attach(design, codes, z, scale: str, alpha: float, anova_rows, terms,
           layout_names, df_resid: int, block_codes=None, response: str = "wall_s"):
    """Name the ANOVA rows of a fraction by their chains and add the fraction table.

    Mutates ``anova_rows`` (dicts in the order of ``terms``, then Residual): each
    factor term gets ``chain`` and ``aliases``; with no residual degrees of freedom
    (an unreplicated fraction) each also gets Lenth's (1989) ``p`` (F stays empty;
    ``test`` says so). Returns ``(fraction table dict, notes)``.
    """
    import numpy as np

    notes = []
    X = np.column_stack([np.where(np.asarray(c) == 1, 1.0, -1.0) for c in codes])
    try:
        frac = estimate_chains(X, z, design, response=response, scale=scale, alpha=alpha,
                               blocks=None if block_codes is None else np.asarray(block_codes))
    except DataError as exc:
        frac = None
        notes.append(f"no table of alias chains: {exc}")
    by_rep = {}
    if frac is not None:
        classes = {W.term(rep, design.factor_names): rep for rep, _ in design.estimable()}
        for e in frac["effects"]:
            by_rep[classes[e["term"]]] = e
    by_name = {t.name: t for t in terms}
    lenth_used = False
    for row in anova_rows:
        t = by_name.get(row.get("term"))
        if t is None or t.is_block:
            continue
        row.update(chain_of(t.factors, layout_names, design))
        e = by_rep.get(class_rep(design, _mask(t.factors, layout_names, design)))
        if e is not None and df_resid <= 0 and e.get("p") is not None and row.get("df"):
            row["p"] = e["p"]
            row["test"] = "Lenth (1989)"
            row["lenth_t"] = e["t"]
            lenth_used = True
    if frac is not None:
        frac["model_terms"] = [r["chain"] for r in anova_rows if r.get("chain")]
    if lenth_used:
        ln = frac["lenth"]
        notes.append(
            f"no replicates: each chain's p comes from Lenth's (1989) method (pseudo standard "
            f"error {ln['pse']:.4g} from the smaller effects, t with {ln['df']:.3g} df; margin of "
            f"error {ln['me']:.4g}, simultaneous margin {ln['sme']:.4g} on the analysis scale)")
    return frac, notes


def lenth_fit(fit, frac: dict):
    """A copy of the model fit whose error is Lenth's, for an unreplicated fraction.

    In a saturated orthogonal two-level design of N runs each effect (mean at +1
    minus mean at -1) has variance 4 sigma^2 / N; Lenth's (1989) PSE estimates its
    standard deviation. Setting the error mean square to PSE^2 N / 4 with m/3
    degrees of freedom therefore gives every effect the interval effect +- ME, and
    any contrast of cell means (level ratios, simple effects, means) its standard
    error from the same PSE, with t on m/3 degrees of freedom.
    """
    from dataclasses import replace

    ln = frac["lenth"]
    mse = float(ln["pse"]) ** 2 * int(frac["runs_used"]) / 4.0
    return replace(fit, rss=mse * float(ln["df"]), df_resid=float(ln["df"]))
