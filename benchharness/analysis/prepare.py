"""Turning a runs table into the arrays the model needs.

Owns: reading the source (DataFrame, tidy CSV or results folder), choosing the
factors, block column and response, keeping only runs with status ``ok`` while
counting failed and timed-out runs per cell, and coding factor levels as small
integers in a fixed level order (the experiment's listed order; for a bare CSV
or DataFrame, the order of first appearance in the data).

Factor levels are compared as exact text: ``1`` and ``1.0`` are two levels.
No formula strings are ever built from names or labels.
"""

from __future__ import annotations

from benchharness.numbers import plural

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from benchharness.errors import DataError, UsageError

#: statuses that are runs of the experiment but produced no usable timing.
_LOST = ("failed", "timeout")


@dataclass(frozen=True)
class Prepared:
    """Everything the model stage needs, as plain arrays."""

    response: str
    factors: tuple[str, ...]                 # experiment factors in the model
    levels: tuple[tuple[str, ...], ...]      # level labels per factor, in order
    codes: tuple[np.ndarray, ...]            # per factor: level code of each ok row
    block: str | None
    block_levels: tuple[str, ...]
    block_codes: np.ndarray | None
    y: np.ndarray                            # response of ok rows (original scale)
    run: np.ndarray | None                   # run ids of ok rows (or row numbers)
    position: np.ndarray | None              # execution order of ok rows, if known
    status_counts: list[dict[str, Any]]      # per factor cell: ok/failed/timeout counts
    notes: tuple[str, ...] = ()
    experiment: Any = None
    order_source: str = "experiment"         # where the level order came from
    extra: dict = field(default_factory=dict)
    rows: np.ndarray | None = None            # index of each ok row in the table read


def load_source(data, factors=None):
    """Return ``(DataFrame, Experiment | None)`` for a DataFrame, CSV path, results folder
    or a results folder already read (`benchharness.results.journal.Results`)."""
    import pandas as pd

    from benchharness.results.source import is_folder_read, load_table, results_table

    if isinstance(data, pd.DataFrame):
        return data, None  # used as is: no copy of a large table
    if is_folder_read(data):
        return results_table(data, factors), data.experiment
    if not isinstance(data, (str, Path)):
        raise UsageError(f"cannot analyse a {type(data).__name__}; give a DataFrame, a CSV file "
                         "or a results folder")
    return load_table(data, factors=factors)


def _as_text(series):
    """Factor column as exact text (CSV readers keep it; DataFrames may hold numbers)."""
    if series.dtype == object:
        return series  # already text when read by our loaders; mixed objects still factorize
    return series.astype(str)


def _code(series, listed: Sequence[str] | None, name: str):
    """Integer codes in listed order (or order of first appearance); unknown labels are an error."""
    import pandas as pd

    if isinstance(series.dtype, pd.CategoricalDtype):
        cats = [str(c) for c in series.cat.categories]
        if listed is None or list(listed) == cats:
            codes = np.asarray(series.cat.codes, dtype=np.int64)
            if (codes < 0).any():
                raise DataError(f"factor {name!r}: some runs have no level")
            return codes, tuple(cats)
        series = series.astype(object)
    text = _as_text(series)
    if listed is not None:
        cat = pd.Categorical(text, categories=list(listed))
        codes = np.asarray(cat.codes, dtype=np.int64)
        if (codes < 0).any():
            bad = text[codes < 0].iloc[0]
            raise DataError(f"factor {name!r}: level {bad!r} in the data is not one of the levels "
                            f"listed in the experiment ({', '.join(map(repr, listed))})")
        return codes, tuple(listed)
    codes, uniques = pd.factorize(text, sort=False)
    if (codes < 0).any():
        raise DataError(f"factor {name!r} has no level in {plural(int((codes < 0).sum()), 'row')}; "
                        "give every row a level")
    return codes.astype(np.int64), tuple(str(u) for u in uniques)


def prepare(data, response=None, factors=None, block=None) -> Prepared:
    """Load and code a runs table.

    ``block``: None or "auto" picks the default block column (``block`` for blocked
    experiments, ``host`` when it has more than one value); False means no block.
    ``response``: None for the experiment file's ``response:``, else ``wall_s``.
    """
    df, exp = load_source(data, factors)
    if response is None:
        from benchharness.experiment.response import default_response

        response = default_response(exp)
    factors = _factor_list(factors, exp)
    _check_columns(df, factors, response)
    notes = list(getattr(df, "attrs", {}).get("journal_notes", ()))
    df, source_rows, status_is = _timed_runs(df)
    df, block, has_hosts = _block_column(df, exp, block, factors, response, notes)
    codes, levels, order_source = _code_factors(df, factors, exp)
    ok = status_is("ok")
    status_counts = _status_counts(codes, levels, factors, ok, status_is)
    y, use = _response_values(df, response, ok, status_is, notes)
    codes, levels = _without_levels_that_never_finished(codes, levels, factors, use, notes)
    block, block_codes, block_levels = _block_codes(df, block, use, notes)
    return Prepared(
        response=response, factors=tuple(factors), levels=tuple(levels),
        codes=tuple(c[use] for c in codes), block=block, block_levels=tuple(block_levels),
        block_codes=block_codes, y=y[use], run=_numeric(df, "run", use),
        position=_numeric(df, "position", use), status_counts=status_counts,
        notes=tuple(notes), experiment=exp, order_source=order_source,
        extra=_extra_columns(df, use, has_hosts, block), rows=source_rows[use],
    )


def _factor_list(factors, exp) -> list[str]:
    """The factors asked for, else the experiment's; each named once."""
    if factors is None:
        if exp is None:
            raise UsageError("name the factors (--factors A,B or factors=[...]): a plain table does "
                             "not say which columns are factors")
        factors = list(exp.factor_names)
    elif isinstance(factors, str):
        factors = [factors]
    factors = list(factors)
    if not factors:
        raise UsageError("at least one factor is needed")
    if len(set(factors)) != len(factors):
        raise UsageError("a factor is named twice in the factor list")
    return factors


def _check_columns(df, factors, response) -> None:
    """Every factor and the response are columns; the response is not a factor."""
    columns = set(df.columns)
    missing = [f for f in factors if f not in columns]
    if missing:
        raise DataError(f"no column named {missing[0]!r} in the data; columns are: "
                        + ", ".join(map(repr, df.columns)))
    if response not in columns:
        raise DataError(f"no response column {response!r} in the data; choose one with --response "
                        "(columns: " + ", ".join(map(repr, df.columns)) + ")")
    if response in factors:
        raise UsageError(f"{response!r} cannot be both the response and a factor")


def _timed_runs(df):
    """(table without warm-up rows, their row numbers in the table read, status test).

    ``status_is(label)`` is a boolean mask over the rows kept; a table without a
    ``status`` column counts every row as ok.
    """
    source_rows = np.arange(len(df))
    if "status" in df.columns:
        st_codes, st_labels = _status_codes(df["status"])
        if "warmup" in st_labels:   # warm-up rows are not part of the experiment
            keep = st_codes != st_labels.index("warmup")
            df = df.loc[keep]
            st_codes = st_codes[keep]
            source_rows = source_rows[keep]
    else:
        st_codes, st_labels = np.zeros(len(df), dtype=np.int64), ["ok"]

    def status_is(label):
        if label not in st_labels:
            return np.zeros(len(st_codes), dtype=bool)
        return st_codes == st_labels.index(label)

    if len(df) == 0:
        raise DataError("the data have no runs to analyse")
    return df, source_rows, status_is


def _status_codes(status):
    """(code of each row, label of each code) of the status column, labels stripped.

    A categorical column (as `load_table` reads a CSV's) is used as coded when its
    stripped labels are distinct, which saves hashing a million strings again; any
    other column is coded in order of first appearance."""
    import pandas as pd

    if isinstance(status.dtype, pd.CategoricalDtype):
        labels = [str(x).strip() for x in status.cat.categories]
        if len(set(labels)) == len(labels):
            return status.cat.codes.to_numpy(), labels
    codes, labels = pd.factorize(status.astype(object), sort=False)
    return codes, [str(x).strip() for x in labels]


def _runs_in_blocks(exp) -> bool:
    """Whether the experiment ran its replicates as blocks (order, a gate, confounded blocks)."""
    if getattr(exp, "order", None) == "blocked":
        return True
    sections = getattr(exp, "sections", None) or {}
    if not hasattr(sections, "get"):
        return False
    # The gate runs baseline and candidate back to back in blocks (benchharness.gate):
    # its folders are blocked experiments too.
    if sections.get("gate") is not None:
        return True
    # A two-level design in confounded blocks (design: {blocks: N} / block_on): its blocks
    # are part of the plan, so they enter the model (the chains confounded with them are
    # then reported, not estimated).
    if sections.get("design") is None:
        return False
    from benchharness.design.spec import design_of
    from benchharness.errors import BenchharnessError

    try:
        return design_of(exp).blocking is not None
    except BenchharnessError:  # a bad design section is reported by plan/run
        return False


def _block_column(df, exp, block, factors, response, notes: list):
    """(table, block column or None, whether the runs span several hosts)."""
    columns = set(df.columns)
    has_hosts = "host" in columns and df["host"].astype(str).nunique() > 1
    if block is False or block == "":
        block = None
    elif block is None or block == "auto":
        block = None
        if "block" in columns and (_runs_in_blocks(exp) or (
                has_hosts and df["block"].astype(str).nunique() > 1)):
            # On a cluster every replicate is a complete block run on one host,
            # so blocks are nested in hosts and the block term absorbs hosts.
            block = "block"
        elif has_hosts:
            block = "host"
    if block == "block" and has_hosts:
        spread = df.groupby(df["block"].astype(str), sort=False)["host"].nunique()
        if (spread > 1).any():
            pair = "block@host"
            df = df.assign(**{pair: df["block"].astype(str) + "@" + df["host"].astype(str)})
            columns.add(pair)
            notes.append(f"{plural(int((spread > 1).sum()), 'block')} ran partly on another host (a "
                         "worker was lost); (block, host) pairs are used as blocks")
            block = pair
    if block is not None:
        if block not in columns:
            raise DataError(f"no block column {block!r} in the data")
        if block in factors or block == response:
            raise UsageError(f"{block!r} cannot be both the block and a factor or the response")
    return df, block, has_hosts


def _without_levels_that_never_finished(codes, levels, factors, use, notes: list):
    """Leave out the levels whose runs all failed or gave no value.

    Such a level has no measurement, so nothing can be said of it: kept, the missing
    cells would read as a fractional design and the level would get a mean predicted
    from alias chains (a statement the data cannot support). Its failures stay in the
    per-cell failure counts, which are taken before this step. A level that never ran
    at all is not touched here.
    """
    new_codes, new_levels = [], []
    for f, c, lv in zip(factors, codes, levels):
        ran = np.bincount(c, minlength=len(lv))
        measured = np.bincount(c[use], minlength=len(lv))
        dead = [i for i in range(len(lv)) if ran[i] and not measured[i]]
        if not dead:
            new_codes.append(c)
            new_levels.append(lv)
            continue
        keep = [i for i in range(len(lv)) if i not in dead]
        index = np.full(len(lv), -1, dtype=c.dtype)
        index[keep] = np.arange(len(keep), dtype=c.dtype)
        new_codes.append(index[c])
        new_levels.append(tuple(lv[i] for i in keep))
        for i in dead:
            notes.append(f"{f}={lv[i]}: none of its {plural(int(ran[i]), 'run')} finished with "
                         "a value, so it is left out of the analysis (its failures are counted "
                         "per cell)")
    return new_codes, new_levels


def _code_factors(df, factors, exp):
    """(codes, levels, where the level order came from) of every factor."""
    codes, levels = [], []
    order_source = "experiment" if exp is not None else "first appearance in the data"
    for f in factors:
        listed = None
        if exp is not None and f in exp.factor_names:
            listed = tuple(exp.levels_of(f))
        elif exp is not None:
            order_source = "experiment (first appearance for factors not in it)"
        c, lv = _code(df[f], listed, f)
        codes.append(c)
        levels.append(lv)
    return codes, levels, order_source


def _status_counts(codes, levels, factors, ok, status_is) -> list[dict[str, Any]]:
    """Per factor cell: runs by status (all statuses, before dropping), over the observed
    cells only (memory O(rows), whatever the plan's size)."""
    from benchharness.analysis.cells import index_cells

    sizes = [len(lv) for lv in levels]
    seen = index_cells(codes, sizes)
    m_cells, inv = seen.count, seen.row_cell
    lost_masks = {s: status_is(s) for s in _LOST}
    n_ok = np.bincount(inv[ok], minlength=m_cells)
    n_lost = {s: np.bincount(inv[m], minlength=m_cells) for s, m in lost_masks.items()}
    n_all = np.bincount(inv, minlength=m_cells)
    other = n_all - n_ok - sum(n_lost.values())
    status_counts = []
    for cell in range(m_cells):
        labels = {f: lv[int(seen.levels[cell, j])] for j, (f, lv) in enumerate(zip(factors,
                                                                                 levels))}
        runs = int(n_all[cell])
        lost = int(sum(n_lost[s][cell] for s in _LOST) + other[cell])
        status_counts.append({
            "levels": labels, "runs": runs, "ok": int(n_ok[cell]),
            "failed": int(n_lost["failed"][cell]), "timeout": int(n_lost["timeout"][cell]),
            "other": int(other[cell]),
            "failure_rate": lost / runs if runs else 0.0,
            "flag": "timeouts" if n_lost["timeout"][cell] else None,
        })
    return status_counts


def _response_values(df, response, ok, status_is, notes: list):
    """(response as floats, mask of the rows analysed: ok with a finite value)."""
    import pandas as pd

    y_col = df[response]
    if pd.api.types.is_numeric_dtype(y_col.dtype):
        y = y_col.to_numpy(dtype=float)
    else:
        y = pd.to_numeric(y_col, errors="coerce").to_numpy(dtype=float)
    use = ok & np.isfinite(y)
    bad_y = int((ok & ~np.isfinite(y)).sum())
    if bad_y:
        notes.append(f"{plural(bad_y, 'ok run')} {'has' if bad_y == 1 else 'have'} no numeric "
                     f"{response!r} value and {'was' if bad_y == 1 else 'were'} left out")
    n_lost = int((~ok).sum())
    if n_lost:
        lost_masks = {s: status_is(s) for s in _LOST}
        said = {"timeout": "timed-out"}
        parts = [f"{int(m.sum())} {said.get(s, s)}" for s, m in lost_masks.items() if m.sum()]
        oth = n_lost - sum(int(m.sum()) for m in lost_masks.values())
        if oth:
            parts.append(f"{oth} with another status")
        notes.append("not analysed: " + ", ".join(parts) + (" run" if n_lost == 1 else " runs")
                     + "; see the failure counts "
                     "per cell")
    if not use.any():
        if ok.any():
            sample = next((str(v) for v in y_col[ok] if str(v).strip()), "")
            raise DataError(f"column {response!r} has no numeric value in the runs to analyse"
                            + (f" (it holds values like {sample!r})" if sample else "")
                            + "; name a numeric column with --response")
        raise DataError(f"no run with status ok and a numeric {response!r} value to analyse")
    return y, use


def _block_codes(df, block, use, notes: list):
    """(block, codes of the analysed rows, labels): blocks in numeric order when every
    label is an integer, blocks without analysed runs dropped, a single block none."""
    if block is None:
        return None, None, ()
    bc, bl = _code(df[block], None, block)
    try:
        as_int = [int(b) for b in bl]
        order = np.argsort(as_int, kind="stable")
        remap = np.empty(len(bl), dtype=np.int64)
        remap[order] = np.arange(len(bl))
        bc = remap[bc]
        bl = tuple(bl[i] for i in order)
    except ValueError:
        pass
    bsel = bc[use]
    present = np.unique(bsel)
    if len(present) < len(bl):  # drop blocks with no ok runs
        remap = -np.ones(len(bl), dtype=np.int64)
        remap[present] = np.arange(len(present))
        bsel = remap[bsel]
        bl = tuple(bl[i] for i in present)
    if len(bl) < 2:
        notes.append(f"block column {block!r} has a single value; no block term")
        return None, None, ()
    return block, bsel, bl


def _numeric(df, col, use):
    """Column ``col`` of the analysed rows as floats; None when absent or not all finite."""
    import pandas as pd

    if col not in df.columns:
        return None
    col_s = df[col]
    if pd.api.types.is_numeric_dtype(col_s.dtype):
        v = col_s.to_numpy(dtype=float)[use]
    else:
        v = pd.to_numeric(col_s, errors="coerce").to_numpy(dtype=float)[use]
    return v if np.isfinite(v).all() else None


def _extra_columns(df, use, has_hosts, block) -> dict:
    """Hosts (when blocks are nested in them) and the load at each run's start."""
    import pandas as pd

    extra = {}
    if has_hosts and block in ("block", "block@host"):
        hc, hl = _code(df["host"].astype(str), None, "host")
        hsel = hc[use]
        present = np.unique(hsel)
        if len(present) > 1:
            remap = -np.ones(len(hl), dtype=np.int64)
            remap[present] = np.arange(len(present))
            extra["host_codes"] = remap[hsel]
            extra["host_levels"] = tuple(hl[i] for i in present)
    if "load_1m" in df.columns:  # machine load at the start of each run (runs.csv column)
        col_s = df["load_1m"]
        extra["load_1m"] = pd.to_numeric(col_s, errors="coerce").to_numpy(dtype=float)[use]
    return extra
