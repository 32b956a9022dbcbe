"""Hosts as blocks: splitting the block sum of squares into between-host and
within-host parts.

When an experiment runs on a cluster, each block (a complete replicate) runs on
one host, so blocks are nested in hosts. The additive block term of the main
model absorbs host differences; this module says how much of it is between
hosts and how much between blocks on the same host, from three fits of the
same factor model on the analysis scale (factors only; factors + host; factors
+ block):

    SS(hosts)              = RSS(factors) − RSS(factors + host)
    SS(blocks within hosts) = RSS(factors + host) − RSS(factors + block)

Hosts are tested against blocks within hosts (the error term of a nested
design; Montgomery, *Design and Analysis of Experiments*, ch. 14), or against
the residual when each host ran a single block.
"""

from __future__ import annotations

import numpy as np


def host_split(prep, z, model, ss_type, fit_block, alpha: float) -> dict | None:
    """The between/within-host decomposition, or None when there is nothing to split."""
    from benchharness.analysis import dist as stats

    from benchharness.analysis.cells import index_cells, moments
    from benchharness.analysis.model import fit_model, model_terms

    hcodes = prep.extra.get("host_codes")
    if hcodes is None or prep.block is None:
        return None
    hlevels = prep.extra["host_levels"]
    fnames = list(prep.factors)
    sizes_f = [len(lv) for lv in prep.levels]

    def rss_with(extra_codes, extra_size):
        names = list(fnames)
        codes = list(prep.codes)
        sizes = list(sizes_f)
        bi = None
        if extra_codes is not None:
            bi = len(names)
            names.append("__block__")
            codes.append(extra_codes)
            sizes.append(extra_size)
        terms = model_terms(names, model, bi)
        cells = index_cells(codes, sizes)
        n = np.bincount(cells.row_cell, minlength=cells.count).astype(float)
        mom = moments(cells.row_cell, z, cells.count, n=n)
        f = fit_model(cells, mom, terms, ss_type)
        return f.rss, f.df_resid

    rss0, df0 = rss_with(None, 0)
    rss_h, df_h = rss_with(hcodes, len(hlevels))
    rss_b, df_b = fit_block.rss, fit_block.df_resid
    ss_host, d_host = max(rss0 - rss_h, 0.0), df0 - df_h
    ss_within, d_within = max(rss_h - rss_b, 0.0), df_h - df_b
    mse = rss_b / df_b if df_b > 0 else float("nan")
    F = p = None
    against = None
    if d_host > 0:
        if d_within > 0 and ss_within > 0:
            F = (ss_host / d_host) / (ss_within / d_within)
            p = float(stats.f.sf(F, d_host, d_within))
            against = "blocks within hosts"
        elif df_b > 0 and mse > 0:
            F = (ss_host / d_host) / mse
            p = float(stats.f.sf(F, d_host, df_b))
            against = "residual"
    # per-host mean residual from the factor-only model, as a ratio on the log scale
    differ = p is not None and p < alpha
    verdict = ("hosts differ significantly: the block term absorbs it, but check that the "
               "hosts are identical machines (hardware, settings, load)" if differ else
               "no evidence that the hosts differ")
    return {
        "hosts": list(hlevels),
        "between_hosts": {"df": int(d_host), "sum_sq": ss_host,
                          "mean_sq": ss_host / d_host if d_host > 0 else None,
                          "F": F, "p": p, "tested_against": against},
        "blocks_within_hosts": {"df": int(d_within), "sum_sq": ss_within,
                                "mean_sq": ss_within / d_within if d_within > 0 else None},
        "differ": bool(differ),
        "verdict": verdict,
        "test": f"F test of hosts against {against}" if against else None,
        "p": p,
        "concern": bool(differ),
    }
