"""Choosing among settings that exist in every environment, when combinations are excluded.

An experiment that excludes combinations (``exclude:``, `benchharness.experiment.space`)
may leave a setting without runs in some workload or environment (``codec: lzma,
level: 9`` never ran with ``rows: large``). Such a setting cannot be the default
across those conditions: it is left out of the candidates before the choice is
made, and the choice says so. Settings that an exclusion removes entirely never
appear in the runs and so are never candidates. Settings missing an environment
for any other reason (failed runs) are not dropped here: `fit_response` refuses
them with its own message, since the experiment meant them to run.
"""

from __future__ import annotations


def drop_unavailable(df, experiment, control, across, response: str):
    """(the table without the runs of settings lacking some ``across`` combination by
    design, [{"setting": {...}, "missing": [{...}, ...]}, ...])."""
    if getattr(experiment, "space", None) is None or not across or response not in df.columns:
        return df, []
    import pandas as pd

    ok = df["status"].astype(str) == "ok" if "status" in df.columns else \
        pd.Series(True, index=df.index)
    ok &= pd.to_numeric(df[response], errors="coerce").notna()
    sub = df.loc[ok, list(control) + list(across)].astype(str)
    if sub.empty:
        return df, []
    s_keys = list(zip(*[sub[c] for c in control]))
    e_keys = list(zip(*[sub[c] for c in across]))
    envs = list(dict.fromkeys(e_keys))
    have: dict[tuple, set] = {}
    for s, e in zip(s_keys, e_keys):
        have.setdefault(s, set()).add(e)
    lacking = {s: [e for e in envs if e not in got] for s, got in have.items()
               if len(got) < len(envs)}
    if not lacking or len(lacking) == len(have):
        return df, []       # every setting lacks something: nothing to compare on; leave it
    keys = list(zip(*[df[c].astype(str) for c in control]))
    keep = [k not in lacking for k in keys]
    out = [{"setting": dict(zip(control, s)),
            "missing": [dict(zip(across, e)) for e in miss]} for s, miss in lacking.items()]
    return df.loc[keep], out


def left_out_counts(table, kept, response: str) -> dict:
    """Runs of ``table`` a choice cannot use, by why: ``unavailable`` (of a setting an
    exclusion keeps from some condition: in ``table`` but not in ``kept``), and among
    ``kept``: ``warmup``, ``failed`` (failed or timed out) and ``no_value`` (ok but no
    finite value of ``response``)."""
    import pandas as pd

    status = (kept["status"].astype(str) if "status" in kept.columns
              else pd.Series("ok", index=kept.index))
    value = (pd.to_numeric(kept[response], errors="coerce") if response in kept.columns
             else pd.Series(float("nan"), index=kept.index))
    ok = status == "ok"
    finite = value.notna() & value.abs().ne(float("inf"))
    return {"failed": int((~ok & (status != "warmup")).sum()),
            "warmup": int((status == "warmup").sum()),
            "no_value": int((ok & ~finite).sum()),
            "unavailable": int(len(table) - len(kept))}


def unavailable_reasons(unavailable, noun: str = "condition") -> list[str]:
    """One sentence per setting left out; ``noun`` names what the ``across`` columns'
    combinations are (workload, environment or condition)."""
    out = []
    for u in unavailable:
        s = ", ".join(f"{k}={v}" for k, v in u["setting"].items())
        miss = "; ".join(", ".join(f"{k}={v}" for k, v in e.items()) for e in u["missing"])
        out.append(f"{s} is not a candidate: the experiment excludes it with {miss}, so it "
                   f"cannot be the default across every {noun}")
    return out
