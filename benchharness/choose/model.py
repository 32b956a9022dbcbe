"""The estimates a choice rests on: per-setting means on the analysis scale and their noise.

This module owns turning a runs table into plain numbers for one response:

* rows kept: ``status == "ok"`` (when a ``status`` column exists) with a numeric,
  finite response;
* the analysis scale: ``log`` when every kept value is positive (times, memory,
  throughput: means become geometric means, differences become ratios),
  otherwise ``none``;
* direction: ``lower`` or ``higher`` is better; the goodness scale used by the
  statistics is ``-y`` for lower-is-better and ``+y`` for higher-is-better;
* cells: every combination of a *setting* (levels of the control factors) and
  an *environment* (levels of the ``across`` columns). Every setting must have
  been run in every environment;
* the residual variance (this is the exact model, see docs/choose.md):
  - ``cells`` (used whenever some cell has two or more runs): the full
    interaction model ``setting x environment`` -- the pooled within-cell
    variance, ``df = N - cells`` (Montgomery, *Design and Analysis of
    Experiments*, ch. 5: the error mean square of the full factorial model);
  - ``additive`` (used only when no cell is replicated, so the full model has
    no error degrees of freedom): ``setting + across_1 + across_2 + ...`` as
    additive main effects, the setting-by-environment interaction pooled into
    the error, ``df = N - rank``;
* a setting's mean: the unweighted average over environments of its cell
  means (each environment counts equally, whatever its number of runs), with
  variance ``sigma^2 * w``, ``w = sum_e (1/n_e) / E^2``.

* a block term (``block`` for experiments run in ``order: blocked``, ``host``
  when runs spread over several hosts -- the same default as the analysis)
  enters either model as an additive term, so drift between blocks or
  differences between hosts do not count as noise. Setting means stay plain
  cell means: with complete blocks the block effects cancel in every
  difference between settings.
"""

from __future__ import annotations

from benchharness.numbers import plural

from dataclasses import dataclass

import numpy as np

from benchharness.errors import DataError

__all__ = ["ResponseModel", "fit_response", "level_orders", "subset_settings"]


@dataclass(frozen=True)
class ResponseModel:
    """Plain estimates of one response; settings and environments in listed order."""

    response: str
    better: str                     # "lower" | "higher"
    scale: str                      # "log" | "none"
    control: tuple[str, ...]        # control factor names
    across: tuple[str, ...]         # environment column names
    settings: tuple[tuple[str, ...], ...]
    environments: tuple[tuple[str, ...], ...]
    cell_means: np.ndarray          # (settings, environments), analysis scale
    cell_counts: np.ndarray         # (settings, environments), runs per cell
    setting_means: np.ndarray       # (settings,), analysis scale
    weights: np.ndarray             # (settings,), Var(setting mean)/sigma^2
    sigma: float                    # residual standard deviation, analysis scale
    df: float                       # its degrees of freedom
    residual_model: str             # "cells" | "additive"
    n_runs: int
    dropped_runs: int               # rows excluded (status not ok, missing value)
    block: str | None = None        # block column fitted as an additive term
    #: settings present in the table without one ok run with a value (not candidates)
    without_runs: tuple[tuple[str, ...], ...] = ()

    @property
    def sign(self) -> float:
        return -1.0 if self.better == "lower" else 1.0

    @property
    def goodness(self) -> np.ndarray:
        """Setting means on a larger-is-better scale."""
        return self.sign * self.setting_means

    @property
    def cell_goodness(self) -> np.ndarray:
        return self.sign * self.cell_means

    def to_response_units(self, x):
        """Back-transform analysis-scale means (geometric means for the log scale)."""
        x = np.asarray(x, dtype=float)
        return np.exp(x) if self.scale == "log" else x


def level_orders(df, columns, experiment=None) -> dict[str, list[str]]:
    """Level labels of each column in listed order.

    The experiment's listed order when known, else a categorical's category
    order, else the order of first appearance in the table.
    """
    import pandas as pd

    orders: dict[str, list[str]] = {}
    exp_names = set(getattr(experiment, "factor_names", ()) or ()) if experiment is not None else set()
    for col in columns:
        present = [str(x) for x in pd.unique(df[col].astype(str))]
        listed: list[str] = []
        if col in exp_names:
            listed = [str(x) for x in experiment.levels_of(col)]
        elif isinstance(df[col].dtype, pd.CategoricalDtype):
            listed = [str(x) for x in df[col].cat.categories]
        order = [x for x in listed if x in present] + [x for x in present if x not in listed]
        orders[col] = order
    return orders


def _ok_rows(df, response: str):
    import pandas as pd

    if response not in df.columns:
        raise DataError(f"response column {response!r} is not in the table "
                        f"(columns: {', '.join(map(str, df.columns))})")
    keep = np.ones(len(df), dtype=bool)
    if "status" in df.columns:
        keep &= (df["status"].astype(str) == "ok").to_numpy()
    y = pd.to_numeric(df[response], errors="coerce").to_numpy(dtype=float)
    keep &= np.isfinite(y)
    return keep, y


def fit_response(df, response: str, control, across=(), better: str = "lower",
                 scale: str = "auto", orders=None, residual: str = "auto",
                 block: str | None = None) -> ResponseModel:
    """Estimate per-setting means and the residual noise of ``response``.

    ``df`` is a runs table; ``control`` and ``across`` name its columns;
    ``orders`` maps columns to level labels in listed order (see
    `level_orders`). ``scale`` is ``auto`` | ``log`` | ``none``; ``residual`` is
    ``auto`` | ``cells`` | ``additive``; ``block`` names a column whose levels
    enter the noise model as an additive term.
    """
    control = tuple(control)
    across = tuple(across)
    _check_request(df, control, across, better)
    keep, y_all = _ok_rows(df, response)
    n_total = len(df)
    sub = df.loc[keep, list(control + across)].astype(str)
    y = y_all[keep]
    if len(y) == 0:
        raise DataError(f"no ok runs with a value of {response!r}")
    scale, y = _on_scale(y, scale, response)
    if orders is None:
        orders = level_orders(df.loc[keep], control + across)

    settings, s_keys = _combos(sub, control, orders)
    without_runs = _without_runs(df, control, settings, orders)
    envs, e_keys = _combos(sub, across, orders)
    s_index = {s: i for i, s in enumerate(settings)}
    e_index = {e: i for i, e in enumerate(envs)}
    si = np.array([s_index[k] for k in s_keys], dtype=int)
    ei = np.array([e_index[k] for k in e_keys], dtype=int)
    S, E = len(settings), len(envs)
    counts = np.zeros((S, E))
    sums = np.zeros((S, E))
    np.add.at(counts, (si, ei), 1)
    np.add.at(sums, (si, ei), y)
    _refuse_gaps(counts, control, across, settings, envs, response)
    means = sums / counts
    n = len(y)
    block_cols, n_blocks = _block_columns(df, keep, block)
    df_cells = n - S * E - max(n_blocks - 1, 0)
    if residual == "auto":
        residual = "cells" if df_cells > 0 else "additive"
    if residual == "cells":
        sse, dfe = _cells_sse(y, si, ei, means, S, E, block_cols)
    elif residual == "additive":
        sse, dfe = _additive_sse(y, si, S, sub, across, orders, block_cols)
    else:
        raise DataError(f"residual must be auto, cells or additive, not {residual!r}")
    if dfe <= 0:
        raise DataError(f"too few runs of {response!r} to estimate the noise ({n} runs, no "
                        "error degrees of freedom left); run replicates")
    sigma = float(np.sqrt(sse / dfe))
    setting_means = means.mean(axis=1)
    weights = (1.0 / counts).sum(axis=1) / (E * E)
    return ResponseModel(
        response=response, better=better, scale=scale, control=control, across=across,
        settings=tuple(settings), environments=tuple(envs), cell_means=means,
        cell_counts=counts, setting_means=setting_means, weights=weights, sigma=sigma,
        df=dfe, residual_model=residual, n_runs=int(n), dropped_runs=int(n_total - n),
        block=block if block_cols else None, without_runs=without_runs,
    )


def _check_request(df, control, across, better) -> None:
    """`DataError` for a direction other than lower/higher, no control factor, or a
    column the table lacks."""
    if better not in ("lower", "higher"):
        raise DataError(f"better must be 'lower' or 'higher', not {better!r}")
    if not control:
        raise DataError("no control factors left to choose between (every factor is in --across)")
    for col in control + across:
        if col not in df.columns:
            raise DataError(f"column {col!r} is not in the table")


def _on_scale(y, scale: str, response: str):
    """``(scale, y)``: the analysis scale ("auto" becomes log when every value is
    positive) and the values on it."""
    if scale == "auto":
        scale = "log" if np.all(y > 0) else "none"
    if scale == "log":
        if np.any(y <= 0):
            raise DataError(f"{response!r} has values <= 0; the log scale needs positive values")
        y = np.log(y)
    elif scale != "none":
        raise DataError(f"scale must be auto, log or none, not {scale!r}")
    return scale, y


def _combos(sub, cols, orders):
    """``(combinations, keys)``: the level combinations of ``cols`` that were run, in the
    product order of the listed levels, and each kept row's combination."""
    keys = list(zip(*[sub[c].tolist() for c in cols])) if cols else [()] * len(sub)
    present = set(keys)
    # product order over listed levels, restricted to what was run
    out: list[tuple[str, ...]] = [()]
    for c in cols:
        out = [o + (lv,) for o in out for lv in orders[c]]
    return [o for o in out if o in present], keys


def _without_runs(df, control, settings, orders) -> tuple:
    """Settings in the table with no ok run with a value, in listed order."""
    seen = set(settings)
    all_keys = zip(*[df[c].astype(str).tolist() for c in control])
    without_runs = tuple(dict.fromkeys(k for k in all_keys if k not in seen))

    def listed(key):
        return tuple(orders[c].index(v) if v in orders.get(c, ()) else len(orders.get(c, ()))
                     for c, v in zip(control, key))
    return tuple(sorted(without_runs, key=listed))


def _refuse_gaps(counts, control, across, settings, envs, response) -> None:
    """`DataError` when some setting has no run in some environment."""
    missing = np.argwhere(counts == 0)
    if missing.size:
        s, e = missing[0]
        where = ", ".join(f"{c}={v}" for c, v in zip(control, settings[s]))
        env = ", ".join(f"{c}={v}" for c, v in zip(across, envs[e]))
        raise DataError(f"setting {where} has no ok run of {response!r} in environment {env}; "
                        f"every setting needs runs in every --across level "
                        f"({plural(len(missing), 'such gap')})")


def _block_columns(df, keep, block):
    """``(indicator columns, number of blocks)`` of the block term (none without one)."""
    if block is None:
        return [], 0
    bl = df.loc[keep, block].astype(str).to_numpy()
    levels = list(dict.fromkeys(bl.tolist()))
    return [(bl == lv).astype(float) for lv in levels[1:]], len(levels)


def _cells_sse(y, si, ei, means, S, E, block_cols):
    """``(SSE, df)`` of the full setting-by-environment model (plus the block term)."""
    if not block_cols:
        resid = y - means[si, ei]
        return float(resid @ resid), float(len(y) - S * E)
    cell = si * E + ei
    X = np.column_stack([(cell == c).astype(float) for c in range(S * E)] + block_cols)
    return _lstsq_sse(X, y)


def _additive_sse(y, si, S, sub, across, orders, block_cols):
    """``(SSE, df)`` of the additive model: setting + each across column (+ blocks)."""
    cols = [np.ones(len(y))]
    for i in range(1, S):
        cols.append((si == i).astype(float))
    for c in across:
        lv = sub[c].to_numpy()
        for level in orders[c][1:]:
            cols.append((lv == level).astype(float))
    return _lstsq_sse(np.column_stack(cols + block_cols), y)


def subset_settings(model: ResponseModel, keep) -> ResponseModel:
    """The same estimates restricted to the settings at indexes ``keep``.

    The noise (sigma, its degrees of freedom) stays the one pooled over every
    setting: leaving settings out of the choice does not change what the runs
    say about the noise.
    """
    from dataclasses import replace

    keep = [int(i) for i in keep]
    return replace(model, settings=tuple(model.settings[i] for i in keep),
                   cell_means=model.cell_means[keep], cell_counts=model.cell_counts[keep],
                   setting_means=model.setting_means[keep], weights=model.weights[keep])


def _lstsq_sse(X, y) -> tuple[float, float]:
    """Residual sum of squares and degrees of freedom of a least-squares fit."""
    beta, *_ = np.linalg.lstsq(X, y, rcond=None)
    r = y - X @ beta
    return float(r @ r), float(len(y) - np.linalg.matrix_rank(X))
