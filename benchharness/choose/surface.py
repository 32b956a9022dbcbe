"""The numeric half of `choose`: a setting between the tested values of a response surface.

When the experiment's design is a response surface (`benchharness.design.surface`)
and the settings chosen are exactly its settings, `choose` also fits the
second-order surface (`benchharness.analysis.surface`, on the scale the choice
uses) and proposes the best setting inside the explored region, never outside
it: the stationary point when it is the optimum and lies inside, else the best
point of the region's edge. The proposal is made only when the surface holds
(no lack of fit against the pure error of repeated runs, and the settings make
a detectable difference); otherwise the choice falls back to the best tested
setting (`choose`'s own recommendation) and says why.

Plain data in, plain data out: ``proposal(...)`` returns the JSON-ready
``surface`` entry of a choice, or None when the design is not a response surface.
"""

from __future__ import annotations

import numpy as np


def proposal(df, experiment, response: str, better: str, scale: str, confidence: float,
             control, across, recommended: dict) -> dict | None:
    """The ``surface`` entry of a choice (see the module docstring), or None."""
    if experiment is None:
        return None
    from benchharness.design.spec import design_of

    design = design_of(experiment).surface
    if design is None:
        return None
    if set(control) != set(design.names) or across:
        return {"used": False,
                "statement": ("The experiment is a response surface over "
                              + ", ".join(design.names) + ", but the settings chosen here "
                              "are not exactly those (or some are taken across conditions): "
                              "no value between the tested levels is proposed")}
    import pandas as pd

    from benchharness.analysis import surface as fit_surface
    from benchharness.analysis.transform import Choice as Scale

    ok = df["status"].astype(str) == "ok" if "status" in df.columns else slice(None)
    rows = df.loc[ok]
    y = pd.to_numeric(rows[response], errors="coerce").to_numpy(dtype=float)
    keep = np.isfinite(y) & ((y > 0) if scale == "log" else True)
    try:
        x = np.column_stack([[s.coded(float(v)) for v in rows[s.name].astype(str)]
                             for s in design.settings])[keep]
    except ValueError:
        return None
    y = y[keep]
    z = np.log(y) if scale == "log" else y
    name = "log" if scale == "log" else "none"
    fit = fit_surface.analyse(design, x, z, Scale(name, 0.0 if name == "log" else 1.0, ""),
                              alpha=1 - confidence, better=better, response=response)
    found = fit_surface.findings(fit, design)
    out = {"used": True, "fitted": fit.get("fitted", False),
           "findings": [f["statement"] for f in found]}
    if not fit.get("fitted"):
        out.update(supported=False, statement=fit["statement"], fallback=dict(recommended))
        return out
    pr, lof = fit["proposal"], fit["lack_of_fit"]
    out.update(lack_of_fit={k: lof.get(k) for k in ("verdict", "F", "p", "df_lack_of_fit",
                                                    "df_pure_error")},
               stationary_point=fit.get("stationary_point"), model_p=fit["model_p"],
               scale=name, supported=bool(pr.get("supported")))
    if pr.get("supported"):
        out.update(setting=_labels(design, pr["actual"]), coded=pr["coded"],
                   where=pr["where"], predicted=pr["predicted"],
                   predicted_interval=pr["predicted_interval"],
                   against_tested_best=pr.get("against_tested_best"),
                   tested_best=_labels(design, pr["tested_best"]["actual"]),
                   statement=found[-1]["statement"])
    else:
        out.update(reason=pr.get("reason"), fallback=dict(recommended),
                   statement=_fallback_text(pr.get("reason"), lof, fit, recommended, design))
    return out


def _labels(design, values: dict) -> dict:
    from benchharness.design.surface import number_label

    return {s.name: number_label(values[s.name], s.whole) for s in design.settings}


def _fallback_text(reason, lof, fit, recommended, design) -> str:
    from benchharness.analysis.surface import p_words

    setting = ", ".join(f"{k}={v}" for k, v in recommended.items())
    if reason == "lack_of_fit":
        why = (f"the fitted second-order surface does not hold (lack of fit F = "
               f"{lof['F']:.3g}, {p_words(lof['p'])})")
    elif reason == "flat":
        why = (f"the settings make no detectable difference on the fitted surface "
               f"({p_words(fit['model_p'])})")
    elif reason == "tested_better":
        from benchharness.analysis.surface import tested_better_words

        why = tested_better_words(fit["proposal"], design)
    else:
        why = "no whole-number setting lies inside the explored region"
    return (f"No value between the tested levels is proposed because {why}; the choice "
            f"falls back to the best tested setting, {setting}")
